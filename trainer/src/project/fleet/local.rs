//! `visviva fleet run`: every unit on this machine, `jobs` units at a time on
//! scoped threads that take the next unit from a shared counter (so at most
//! `jobs` units hold their data in memory), with one progress bar over the
//! units. A failed unit is reported and the others go on; Ctrl-C stops
//! units from starting and lets running fits stop at their best so far.

use std::io::Write as _;
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::Mutex;

use indicatif::{ProgressBar, ProgressStyle};

use crate::project::fleet::file::Fleet;
use crate::project::fleet::unit::{run_unit, UnitState, UnitStatus};

/// Run every unit; returns their statuses in the fleet's unit order. `on_done`
/// receives each status as it finishes (for printing above the bar).
pub fn run_fleet(
    fleet: &Fleet,
    jobs: usize,
    force: bool,
    show_bar: bool,
    on_done: &(dyn Fn(&UnitStatus) -> String + Sync),
) -> Vec<UnitStatus> {
    let n = fleet.units.len();
    let bar = if show_bar {
        ProgressBar::new(n as u64)
    } else {
        ProgressBar::hidden()
    };
    bar.set_style(
        ProgressStyle::with_template("{bar:30} {pos}/{len} units, {elapsed} {msg}")
            .unwrap_or_else(|_| ProgressStyle::default_bar()),
    );
    let next = AtomicUsize::new(0);
    let failed = AtomicUsize::new(0);
    let results: Mutex<Vec<Option<UnitStatus>>> = Mutex::new(vec![None; n]);
    std::thread::scope(|s| {
        for _ in 0..jobs.clamp(1, n.max(1)) {
            s.spawn(|| loop {
                let i = next.fetch_add(1, Ordering::SeqCst);
                let Some(unit) = fleet.units.get(i) else {
                    break;
                };
                let status = run_unit(unit, force);
                if status.state != UnitState::Done {
                    failed.fetch_add(1, Ordering::SeqCst);
                    bar.set_message(format!("{} failed", failed.load(Ordering::SeqCst)));
                }
                let line = on_done(&status);
                if bar.is_hidden() {
                    // A closed stdout (`| head`) must not stop the other units.
                    let _ = writeln!(std::io::stdout(), "{line}");
                } else {
                    bar.println(line);
                }
                bar.inc(1);
                if let Ok(mut r) = results.lock() {
                    r[i] = Some(status);
                }
            });
        }
    });
    bar.finish_and_clear();
    results
        .into_inner()
        .unwrap_or_default()
        .into_iter()
        .flatten()
        .collect()
}
