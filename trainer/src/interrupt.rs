//! Ctrl-C, handled once per process: a flag long work polls (a fit stops
//! and keeps its best parameters), and a count of presses, so that work
//! started after an earlier Ctrl-C (the fit then saving what it kept) reacts
//! only to a new one. Writers poll it through [`Watch`] and return
//! [`Interrupted`]; their temporary files are removed as they drop.

use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::{Arc, OnceLock};

/// The process's Ctrl-C state.
struct Shared {
    flag: Arc<AtomicBool>,
    presses: Arc<AtomicU64>,
}

/// The shared state, installing the handler on first use. Fits running side
/// by side (a fleet's units on a thread pool) share it rather than fight
/// over the handler.
fn shared() -> &'static Shared {
    static STATE: OnceLock<Shared> = OnceLock::new();
    STATE.get_or_init(|| {
        let flag = Arc::new(AtomicBool::new(false));
        let presses = Arc::new(AtomicU64::new(0));
        let (f, p) = (flag.clone(), presses.clone());
        let handler = move || {
            p.fetch_add(1, Ordering::SeqCst);
            f.store(true, Ordering::SeqCst);
        };
        if let Err(e) = ctrlc::set_handler(handler) {
            eprintln!("warning: Ctrl-C will not stop work cleanly ({e})");
        }
        Shared { flag, presses }
    })
}

/// The flag Ctrl-C sets (and never clears).
pub fn flag() -> Arc<AtomicBool> {
    shared().flag.clone()
}

/// Why work stopped early.
#[derive(Debug, thiserror::Error)]
#[error("interrupted by Ctrl-C")]
pub struct Interrupted;

/// Watches for a Ctrl-C pressed after its creation.
#[derive(Debug, Clone, Copy)]
pub struct Watch {
    start: u64,
}

impl Watch {
    /// Start watching (installs the handler if no one has yet).
    pub fn new() -> Self {
        Self {
            start: shared().presses.load(Ordering::SeqCst),
        }
    }

    /// Whether Ctrl-C was pressed since [`Watch::new`].
    pub fn interrupted(&self) -> bool {
        shared().presses.load(Ordering::SeqCst) > self.start
    }

    /// `Err(Interrupted)` once Ctrl-C was pressed since [`Watch::new`].
    pub fn check(&self) -> Result<(), Interrupted> {
        if self.interrupted() {
            Err(Interrupted)
        } else {
            Ok(())
        }
    }
}

impl Default for Watch {
    fn default() -> Self {
        Self::new()
    }
}
