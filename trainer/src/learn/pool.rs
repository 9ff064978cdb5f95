//! Worker threads kept for a whole fit: the loss and gradient of one
//! optimizer step (or one chunk of validation rows) split by rows at fixed
//! boundaries, part k on worker k (part 0 on the calling thread), and the
//! parts' losses and gradients added in part order, so a seed gives a
//! bit-identical fit for a given thread count. The workers start once per
//! fit and wait on a condition variable between steps (after spinning for
//! up to [`SPIN`], so a busy fit's workers never sleep); a step copies the
//! parameters and the row indices into buffers sized once, so it allocates
//! nothing (the objective's own buffers are sized once per row count). A
//! part longer than [`CHUNK_ROWS`] is evaluated chunk by chunk.
//! Rows come from a [`RowSource`] (see [`crate::learn::rows`]).

use std::sync::atomic::{AtomicBool, AtomicU64, AtomicUsize, Ordering};
use std::sync::{Condvar, Mutex, MutexGuard, PoisonError, RwLock};
use std::time::{Duration, Instant};

use ndarray::{s, Array2};

use crate::learn::hnn::Objective;
use crate::learn::rows::RowSource;

/// Rows of one evaluation: indices into the training rows (a minibatch), or
/// a contiguous range of the validation rows.
#[derive(Debug, Clone, Copy)]
pub(crate) enum Rows<'r> {
    /// These training rows, in this order.
    Train(&'r [usize]),
    /// Validation rows `start..end`.
    Validation(usize, usize),
}

/// What every part of one evaluation reads.
struct Job {
    params: Vec<f32>,
    /// Minibatch indices (training rows).
    rows: Vec<usize>,
    /// Validation rows `range.0..range.1` instead of `rows`.
    validation: bool,
    range: (usize, usize),
    want_grad: bool,
}

impl Job {
    fn len(&self) -> usize {
        if self.validation {
            self.range.1 - self.range.0
        } else {
            self.rows.len()
        }
    }
}

/// Most rows one part evaluates at once: a longer part runs chunk after
/// chunk, adding their losses and gradients in row order, so the network's
/// activations stay in the core's cache (measured in bench/README.md:
/// full-batch throughput per sample fell below batch 256's without it).
const CHUNK_ROWS: usize = 256;

/// One part's buffers and result.
struct Lane<W> {
    /// The objective's buffers for whole chunks of [`CHUNK_ROWS`] rows.
    work: W,
    /// Its buffers for a part's last, shorter chunk (a second set, so that
    /// neither changes its row count from step to step and reallocates).
    tail_work: W,
    grad: Vec<f32>,
    /// Gathered rows of this part (inputs, targets).
    zb: Array2<f32>,
    tb: Array2<f32>,
    loss: f64,
}

/// Who runs next: the evaluation counter the workers wait on, how many of
/// them are still busy, the stop flag, and whether a worker panicked.
#[derive(Default)]
struct Control {
    generation: u64,
    pending: usize,
    stop: bool,
    failed: bool,
}

/// State shared by the calling thread and the workers.
struct Shared<'d, O: Objective> {
    obj: &'d O,
    train: &'d dyn RowSource,
    validation: Option<&'d dyn RowSource>,
    job: RwLock<Job>,
    lanes: Vec<Mutex<Lane<O::Work>>>,
    control: Mutex<Control>,
    start: Condvar,
    done: Condvar,
    /// Lock-free copies of `control`'s generation, stop flag and pending
    /// count, for the short spin before a wait ([`spin_until`]); the mutex
    /// and condition variables stay the authority.
    posted: AtomicU64,
    stopping: AtomicBool,
    unfinished: AtomicUsize,
}

/// How long a thread spins on the lock-free copies before it waits on a
/// condition variable: longer than the calling thread's work between two
/// steps (reduction, optimizer update), so a busy fit's workers never
/// sleep, and short enough to cost little when the machine is shared.
const SPIN: Duration = Duration::from_micros(100);

/// Spin until `ready` holds or [`SPIN`] has passed.
fn spin_until(ready: impl Fn() -> bool) {
    let started = Instant::now();
    while !ready() {
        for _ in 0..32 {
            std::hint::spin_loop();
        }
        if started.elapsed() > SPIN {
            return;
        }
    }
}

fn lock<T>(m: &Mutex<T>) -> MutexGuard<'_, T> {
    // A worker that panicked is reported by the scope's join; the data
    // behind the lock is plain buffers, still usable.
    m.lock().unwrap_or_else(PoisonError::into_inner)
}

/// The calling thread's handle on the pool (see [`with_pool`]).
pub(crate) struct Pool<'s, 'd, O: Objective> {
    shared: &'s Shared<'d, O>,
}

/// Sizes of the pool's buffers.
#[derive(Debug, Clone, Copy)]
pub(crate) struct PoolSize {
    /// Parts (threads, including the calling one); at least 1.
    pub threads: usize,
    /// Parameters of the objective.
    pub params: usize,
    /// Most rows in one evaluation (a minibatch or a validation chunk).
    pub max_rows: usize,
}

/// Run `body` with a pool of `size.threads - 1` workers (none for one
/// thread) over the training rows `train` and the optional validation
/// rows; the workers stop when `body` returns.
pub(crate) fn with_pool<'d, O: Objective, R>(
    obj: &'d O,
    train: &'d dyn RowSource,
    validation: Option<&'d dyn RowSource>,
    size: PoolSize,
    body: impl FnOnce(&mut Pool<'_, 'd, O>) -> R,
) -> R {
    let threads = size.threads.max(1);
    let part_rows = size.max_rows.div_ceil(threads).clamp(1, CHUNK_ROWS);
    let (zw, tw) = train.widths();
    let lane = |_| {
        Mutex::new(Lane {
            work: O::Work::default(),
            tail_work: O::Work::default(),
            grad: vec![0.0; size.params],
            zb: Array2::zeros((part_rows, zw)),
            tb: Array2::zeros((part_rows, tw)),
            loss: 0.0,
        })
    };
    let shared = Shared {
        obj,
        train,
        validation,
        job: RwLock::new(Job {
            params: vec![0.0; size.params],
            rows: Vec::with_capacity(size.max_rows),
            validation: false,
            range: (0, 0),
            want_grad: false,
        }),
        lanes: (0..threads).map(lane).collect(),
        control: Mutex::new(Control::default()),
        posted: AtomicU64::new(0),
        stopping: AtomicBool::new(false),
        unfinished: AtomicUsize::new(0),
        start: Condvar::new(),
        done: Condvar::new(),
    };
    std::thread::scope(|scope| {
        for k in 1..threads {
            let shared = &shared;
            scope.spawn(move || worker(shared, k));
        }
        // Stop the workers however `body` ends (a panic included), so the
        // scope can join them.
        struct StopOnDrop<'a, 'd, O: Objective>(&'a Shared<'d, O>);
        impl<O: Objective> Drop for StopOnDrop<'_, '_, O> {
            fn drop(&mut self) {
                lock(&self.0.control).stop = true;
                self.0.stopping.store(true, Ordering::Release);
                self.0.start.notify_all();
            }
        }
        let _stop = StopOnDrop(&shared);
        body(&mut Pool { shared: &shared })
    })
}

/// A worker: wait for the next evaluation, run its part, report, repeat.
fn worker<O: Objective>(shared: &Shared<'_, O>, k: usize) {
    let mut seen = 0u64;
    loop {
        spin_until(|| {
            shared.posted.load(Ordering::Acquire) != seen || shared.stopping.load(Ordering::Acquire)
        });
        {
            let mut c = lock(&shared.control);
            while c.generation == seen && !c.stop {
                c = shared.start.wait(c).unwrap_or_else(PoisonError::into_inner);
            }
            if c.stop {
                return;
            }
            seen = c.generation;
        }
        let _report = Finished(shared);
        run_part(shared, k);
    }
}

/// Reports a worker's part as finished when dropped, also when the part
/// panicked (so the calling thread never waits forever).
struct Finished<'a, 'd, O: Objective>(&'a Shared<'d, O>);

impl<O: Objective> Drop for Finished<'_, '_, O> {
    fn drop(&mut self) {
        let mut c = lock(&self.0.control);
        c.failed |= std::thread::panicking();
        c.pending -= 1;
        self.0.unfinished.fetch_sub(1, Ordering::Release);
        if c.pending == 0 {
            self.0.done.notify_one();
        }
    }
}

/// Part `k` of the current job: rows `k * n / parts .. (k + 1) * n / parts`.
fn run_part<O: Objective>(shared: &Shared<'_, O>, k: usize) {
    let job = shared.job.read().unwrap_or_else(PoisonError::into_inner);
    let mut lane = lock(&shared.lanes[k]);
    let lane = &mut *lane;
    let n = job.len();
    let parts = shared.lanes.len().min(n).max(1);
    if k >= parts {
        lane.loss = 0.0;
        return;
    }
    let (a, b) = (k * n / parts, (k + 1) * n / parts);
    if job.want_grad {
        lane.grad.iter_mut().for_each(|v| *v = 0.0);
    }
    lane.loss = 0.0;
    for start in (a..b).step_by(CHUNK_ROWS) {
        let end = (start + CHUNK_ROWS).min(b);
        lane.loss += run_chunk(shared, &job, start..end, lane);
    }
}

/// Rows `rows` of the job (at most [`CHUNK_ROWS`]) gathered into the lane's
/// buffers; their loss sum, their gradient added to the lane's.
fn run_chunk<O: Objective>(
    shared: &Shared<'_, O>,
    job: &Job,
    rows: std::ops::Range<usize>,
    lane: &mut Lane<O::Work>,
) -> f64 {
    let len = rows.len();
    if job.validation {
        let v = shared.validation.expect("validation rows were asked for");
        let s0 = job.range.0;
        gather(v, s0 + rows.start..s0 + rows.end, lane);
    } else {
        gather(shared.train, job.rows[rows].iter().copied(), lane);
    }
    let grad = job.want_grad.then_some(lane.grad.as_mut_slice());
    let work = if len == CHUNK_ROWS {
        &mut lane.work
    } else {
        &mut lane.tail_work
    };
    shared.obj.loss_sum(
        &job.params,
        lane.zb.slice(s![..len, ..]),
        lane.tb.slice(s![..len, ..]),
        work,
        grad,
    )
}

/// Copy the source rows `rows` into the first rows of the lane's buffers.
fn gather<W>(source: &dyn RowSource, rows: impl Iterator<Item = usize>, lane: &mut Lane<W>) {
    for (r, i) in rows.enumerate() {
        let (mut z, mut t) = (lane.zb.row_mut(r), lane.tb.row_mut(r));
        let (z, t) = (
            z.as_slice_mut().expect("standard layout"),
            t.as_slice_mut().expect("standard layout"),
        );
        source.copy_row(i, z, t);
    }
}

impl<O: Objective> Pool<'_, '_, O> {
    /// Sum of per-sample losses over `rows` with parameters `params` and,
    /// with `grad`, the summed gradient: parts on the workers and on this
    /// thread, results added in part order.
    pub(crate) fn loss_sum(
        &mut self,
        params: &[f32],
        rows: Rows<'_>,
        grad: Option<&mut [f32]>,
    ) -> f64 {
        let shared = self.shared;
        self.set_job(params, rows, grad.is_some());
        let workers = shared.lanes.len() - 1;
        if workers > 0 {
            let mut c = lock(&shared.control);
            c.generation += 1;
            c.pending = workers;
            shared.unfinished.store(workers, Ordering::Release);
            shared.posted.store(c.generation, Ordering::Release);
            shared.start.notify_all();
        }
        run_part(shared, 0);
        if workers > 0 {
            spin_until(|| shared.unfinished.load(Ordering::Acquire) == 0);
            let mut c = lock(&shared.control);
            while c.pending > 0 {
                c = shared.done.wait(c).unwrap_or_else(PoisonError::into_inner);
            }
            assert!(!c.failed, "a fit worker thread panicked");
        }
        self.reduce(grad)
    }

    /// Copy the step's parameters and rows into the job (no allocation:
    /// the buffers were sized for the largest evaluation).
    fn set_job(&mut self, params: &[f32], rows: Rows<'_>, want_grad: bool) {
        let mut job = self
            .shared
            .job
            .write()
            .unwrap_or_else(PoisonError::into_inner);
        job.params.copy_from_slice(params);
        job.rows.clear();
        job.want_grad = want_grad;
        job.validation = matches!(rows, Rows::Validation(..));
        match rows {
            Rows::Train(idx) => job.rows.extend_from_slice(idx),
            Rows::Validation(a, b) => job.range = (a, b),
        }
    }

    /// The parts' losses summed in part order; the gradients likewise.
    fn reduce(&self, grad: Option<&mut [f32]>) -> f64 {
        let n = self
            .shared
            .job
            .read()
            .unwrap_or_else(PoisonError::into_inner)
            .len();
        let parts = self.shared.lanes.len().min(n).max(1);
        let lanes = &self.shared.lanes[..parts];
        if let Some(grad) = grad {
            grad.copy_from_slice(&lock(&lanes[0]).grad);
            for lane in &lanes[1..] {
                let lane = lock(lane);
                grad.iter_mut().zip(&lane.grad).for_each(|(a, b)| *a += b);
            }
        }
        lanes.iter().map(|l| lock(l).loss).sum()
    }
}

#[cfg(test)]
mod tests {
    //! The pool's sums against the same sums in f64, for parts longer than
    //! a chunk (whole chunks and a shorter last one) and several threads.
    use super::*;
    use crate::learn::rows::ArraySource;
    use ndarray::{Array2, ArrayView2};

    /// Least squares l = sum_b (w . z_b - t_b)^2, gradient 2 sum_b r_b z_b.
    struct LeastSquares;

    impl Objective for LeastSquares {
        type Work = ();
        fn param_count(&self) -> usize {
            3
        }
        fn loss_sum(
            &self,
            p: &[f32],
            z: ArrayView2<'_, f32>,
            t: ArrayView2<'_, f32>,
            _work: &mut (),
            grad: Option<&mut [f32]>,
        ) -> f64 {
            let mut total = 0.0f64;
            let mut g = [0.0f32; 3];
            for (zb, tb) in z.rows().into_iter().zip(t.rows()) {
                let r: f32 = zb.iter().zip(p).map(|(a, b)| a * b).sum::<f32>() - tb[0];
                total += f64::from(r * r);
                g.iter_mut()
                    .zip(zb)
                    .for_each(|(gi, zi)| *gi += 2.0 * r * zi);
            }
            if let Some(grad) = grad {
                grad.iter_mut().zip(g).for_each(|(a, b)| *a += b);
            }
            total
        }
    }

    #[test]
    fn chunked_parts_sum_to_the_whole_batch() {
        let n = 2 * CHUNK_ROWS + 3 * CHUNK_ROWS / 4;
        let z = Array2::from_shape_fn((n, 3), |(i, j)| ((i * 7 + j * 3) % 11) as f32 / 11.0 - 0.5);
        let t = Array2::from_shape_fn((n, 1), |(i, _)| ((i * 5) % 13) as f32 / 13.0);
        let p = [0.3f32, -0.2, 0.7];
        // The same sums in f64, row by row.
        let (mut want_loss, mut want_grad) = (0.0f64, [0.0f64; 3]);
        for (zb, tb) in z.rows().into_iter().zip(t.rows()) {
            let r: f64 = zb
                .iter()
                .zip(p)
                .map(|(a, b)| f64::from(*a) * f64::from(b))
                .sum::<f64>()
                - f64::from(tb[0]);
            want_loss += r * r;
            want_grad
                .iter_mut()
                .zip(zb)
                .for_each(|(g, zi)| *g += 2.0 * r * f64::from(*zi));
        }
        let source = ArraySource {
            z: z.view(),
            t: t.view(),
        };
        let rows: Vec<usize> = (0..n).collect();
        for threads in [1, 2, 3] {
            let size = PoolSize {
                threads,
                params: 3,
                max_rows: n,
            };
            let (loss, grad, again) = with_pool(&LeastSquares, &source, None, size, |pool| {
                let mut grad = [0.0f32; 3];
                let loss = pool.loss_sum(&p, Rows::Train(&rows), Some(&mut grad));
                let mut again = [0.0f32; 3];
                pool.loss_sum(&p, Rows::Train(&rows), Some(&mut again));
                (loss, grad, again)
            });
            assert!(
                (loss - want_loss).abs() <= 1e-5 * want_loss,
                "{threads} threads: loss {loss} vs {want_loss}"
            );
            for (g, w) in grad.iter().zip(want_grad) {
                assert!(
                    (f64::from(*g) - w).abs() <= 1e-4 * w.abs().max(1.0),
                    "{threads} threads: {g} vs {w}"
                );
            }
            assert_eq!(
                grad.map(f32::to_bits),
                again.map(f32::to_bits),
                "reproducible"
            );
        }
    }
}
