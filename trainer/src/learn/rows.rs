//! Where a fit's rows come from: normalized arrays, or the loaded log
//! itself, normalized row by row as a minibatch is gathered, so no
//! normalized copy of a large log is held beside it (the values are the
//! same: one function normalizes a row either way).

use ndarray::ArrayView2;

use crate::data::dataset::Dataset;
use crate::learn::hnn::Normalization;

/// Where an evaluation's rows come from.
pub(crate) trait RowSource: Sync {
    /// Number of rows.
    fn rows(&self) -> usize;
    /// Columns of (inputs, targets).
    fn widths(&self) -> (usize, usize);
    /// Write row `i`'s inputs into `z` and targets into `t`.
    fn copy_row(&self, i: usize, z: &mut [f32], t: &mut [f32]);
}

/// Rows of normalized arrays (inputs, targets).
pub(crate) struct ArraySource<'d> {
    /// Inputs, one row per sample.
    pub z: ArrayView2<'d, f32>,
    /// Targets, one row per sample.
    pub t: ArrayView2<'d, f32>,
}

impl RowSource for ArraySource<'_> {
    fn rows(&self) -> usize {
        self.z.nrows()
    }

    fn widths(&self) -> (usize, usize) {
        (self.z.ncols(), self.t.ncols())
    }

    fn copy_row(&self, i: usize, z: &mut [f32], t: &mut [f32]) {
        z.iter_mut().zip(self.z.row(i)).for_each(|(a, b)| *a = *b);
        t.iter_mut().zip(self.t.row(i)).for_each(|(a, b)| *a = *b);
    }
}

/// The rows of a loaded log, normalized by `norm` as they are read; row
/// `i` counts through the trajectories in order.
pub(crate) struct LogRows<'d> {
    norm: &'d Normalization,
    data: &'d Dataset,
    /// First row of each trajectory, and the total at the end.
    starts: Vec<usize>,
}

impl<'d> LogRows<'d> {
    /// The rows of `data` normalized by `norm`.
    pub(crate) fn new(norm: &'d Normalization, data: &'d Dataset) -> Self {
        let mut starts = Vec::with_capacity(data.trajectories.len() + 1);
        let mut total = 0;
        starts.push(0);
        for t in &data.trajectories {
            total += t.x.nrows();
            starts.push(total);
        }
        Self { norm, data, starts }
    }
}

impl RowSource for LogRows<'_> {
    fn rows(&self) -> usize {
        self.starts[self.starts.len() - 1]
    }

    fn widths(&self) -> (usize, usize) {
        (2 * self.data.dof, 2 * self.data.dof)
    }

    fn copy_row(&self, i: usize, z: &mut [f32], t: &mut [f32]) {
        // The trajectory holding row i: the last start not above i.
        let k = self.starts.partition_point(|s| *s <= i) - 1;
        let tr = &self.data.trajectories[k];
        let r = i - self.starts[k];
        self.norm.normalize_row(tr.x.row(r), tr.dx.row(r), z, t);
    }
}
