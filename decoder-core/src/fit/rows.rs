//! The pieces every streaming fit shares: a window over the last few rows
//! of a pass (a fit that pairs counts with the kinematics `lag` bins later,
//! or a history term, looks back a bounded number of rows), a walk of a
//! pass that says which segment each row lies in, and a block with some of
//! its rows left out and the rest numbered end to end (the training bins of
//! a cross-validation fold).
//!
//! Memory is the window's few rows and the segment lists, never the block.

use std::ops::Range;

use crate::formats::block::BlockError;
use crate::formats::block_rows::{BlockInfo, BlockRows, RowChunk};
use crate::wire::packet::{BinKind, BinValues};

/// The last `capacity` rows of a pass (counts or features, and
/// kinematics), newest at `back = 0`.
#[derive(Clone, Debug)]
pub struct RowWindow {
    n: usize,
    k: usize,
    capacity: usize,
    input: BinKind,
    counts: Vec<u16>,
    features: Vec<f32>,
    kinematics: Vec<f64>,
    /// Rows pushed so far.
    pushed: usize,
}

impl RowWindow {
    /// A window of rows of `input`.
    pub fn new(
        input: BinKind,
        n_channels: usize,
        n_kinematics: usize,
        capacity: usize,
    ) -> RowWindow {
        let capacity = capacity.max(1);
        let values = capacity * n_channels;
        RowWindow {
            n: n_channels,
            k: n_kinematics,
            capacity,
            input,
            counts: vec![0; if input == BinKind::Counts { values } else { 0 }],
            features: vec![
                0.0;
                if input == BinKind::Features {
                    values
                } else {
                    0
                }
            ],
            kinematics: vec![0.0; capacity * n_kinematics],
            pushed: 0,
        }
    }

    pub fn push(&mut self, values: BinValues<'_>, kinematics: &[f64]) {
        let slot = self.pushed % self.capacity;
        let at = slot * self.n..(slot + 1) * self.n;
        match values {
            BinValues::Counts(c) => self.counts[at].copy_from_slice(c),
            BinValues::Features(f) => self.features[at].copy_from_slice(f),
        }
        if self.k > 0 && !kinematics.is_empty() {
            self.kinematics[slot * self.k..(slot + 1) * self.k].copy_from_slice(kinematics);
        }
        self.pushed += 1;
    }

    fn slot(&self, back: usize) -> usize {
        debug_assert!(back < self.capacity && back < self.pushed);
        (self.pushed - 1 - back) % self.capacity
    }

    /// The counts of the row `back` rows before the newest (a window of
    /// counts).
    pub fn counts(&self, back: usize) -> &[u16] {
        let s = self.slot(back);
        &self.counts[s * self.n..(s + 1) * self.n]
    }

    /// The values of the row `back` rows before the newest.
    pub fn values(&self, back: usize) -> BinValues<'_> {
        let s = self.slot(back);
        match self.input {
            BinKind::Counts => BinValues::Counts(&self.counts[s * self.n..(s + 1) * self.n]),
            BinKind::Features => BinValues::Features(&self.features[s * self.n..(s + 1) * self.n]),
        }
    }

    /// The kinematics of the row `back` rows before the newest.
    pub fn kinematics(&self, back: usize) -> &[f64] {
        let s = self.slot(back);
        &self.kinematics[s * self.k..(s + 1) * self.k]
    }
}

/// Calls `visit(row, values, kinematics)` for every row of a pass.
pub fn each_row(
    source: &dyn BlockRows,
    n_kinematics: usize,
    mut visit: impl FnMut(usize, BinValues<'_>, &[f64]),
) -> Result<(), BlockError> {
    let n = source.info().n_channels;
    source.pass(&mut |chunk: RowChunk<'_>| {
        for r in 0..chunk.rows {
            let kin = if chunk.kinematics.is_empty() {
                &[][..]
            } else {
                &chunk.kinematics[r * n_kinematics..(r + 1) * n_kinematics]
            };
            visit(chunk.first + r, chunk.values(r, n), kin);
        }
    })
}

/// [`each_row`] for a pass that reads counts: a block of features is
/// refused before such a pass (the point-process fits and the click
/// decoder), so a row of features here is a bug.
pub fn each_count_row(
    source: &dyn BlockRows,
    n_kinematics: usize,
    mut visit: impl FnMut(usize, &[u16], &[f64]),
) -> Result<(), BlockError> {
    each_row(source, n_kinematics, |t, values, kin| match values {
        BinValues::Counts(c) => visit(t, c, kin),
        BinValues::Features(_) => unreachable!("a pass over counts was handed features"),
    })
}

/// One pass over the rows of groups of segments (`groups[g]`, disjoint
/// across groups): each row inside a segment is pushed into a window of
/// the last `window_rows` rows of its segment and `visit(g, since_start,
/// window)` called with its group and how many rows of its segment came
/// before it. Rows outside every segment are skipped.
pub fn each_segment_row(
    source: &dyn BlockRows,
    groups: &[Vec<Range<usize>>],
    window_rows: usize,
    mut visit: impl FnMut(usize, usize, &RowWindow),
) -> Result<(), BlockError> {
    let info = source.info();
    let (n, k) = (info.n_channels, info.kinematic_names.len());
    let mut walk = SegmentWalk::new(
        groups
            .iter()
            .enumerate()
            .flat_map(|(g, segs)| segs.iter().map(move |s| (s.clone(), g)))
            .collect(),
    );
    let mut window = RowWindow::new(info.input, n, k, window_rows);
    each_row(source, k, |t, values, kin| {
        if let Some((seg, g)) = walk.at(t) {
            window.push(values, kin);
            visit(g, t - seg.start, &window);
        }
    })
}

/// Which of a sorted list of disjoint segments a row lies in, for rows
/// visited in increasing order.
#[derive(Clone, Debug)]
pub struct SegmentWalk<T> {
    segments: Vec<(Range<usize>, T)>,
    next: usize,
}

impl<T: Copy> SegmentWalk<T> {
    /// `segments` in any order; they must not overlap.
    pub fn new(mut segments: Vec<(Range<usize>, T)>) -> SegmentWalk<T> {
        segments.retain(|(r, _)| !r.is_empty());
        segments.sort_by_key(|(r, _)| r.start);
        SegmentWalk { segments, next: 0 }
    }

    /// The segment holding `row` and its tag; rows must come in increasing
    /// order.
    pub fn at(&mut self, row: usize) -> Option<(Range<usize>, T)> {
        while self.next < self.segments.len() && self.segments[self.next].0.end <= row {
            self.next += 1;
        }
        let (r, tag) = self.segments.get(self.next)?;
        r.contains(&row).then(|| (r.clone(), *tag))
    }
}

/// A block with the rows of `left_out` removed and the rest numbered end to
/// end: what a fold trains on. It has no trials.
pub struct Without<'a> {
    inner: &'a (dyn BlockRows + Sync),
    /// Sorted, disjoint.
    left_out: Vec<Range<usize>>,
}

impl<'a> Without<'a> {
    pub fn new(inner: &'a (dyn BlockRows + Sync), mut left_out: Vec<Range<usize>>) -> Without<'a> {
        left_out.retain(|r| !r.is_empty());
        left_out.sort_by_key(|r| r.start);
        Without { inner, left_out }
    }
}

impl BlockRows for Without<'_> {
    fn info(&self) -> BlockInfo {
        let mut info = self.inner.info();
        let removed: usize = self
            .left_out
            .iter()
            .map(|r| r.end.min(info.n_bins).saturating_sub(r.start))
            .sum();
        // Edges keep their place among the kept rows.
        let before = |row: usize| -> usize {
            self.left_out
                .iter()
                .map(|r| r.end.min(row).saturating_sub(r.start))
                .sum()
        };
        info.edges = info.edges.iter().map(|&e| e - before(e)).collect();
        info.edges.dedup();
        info.n_bins -= removed;
        info.edges.retain(|&e| e > 0 && e < info.n_bins);
        info.block_starts = info.block_starts.iter().map(|&e| e - before(e)).collect();
        info.trials = None;
        info
    }

    fn pass(&self, visit: &mut dyn FnMut(RowChunk<'_>)) -> Result<(), BlockError> {
        let info = self.inner.info();
        let (n, k) = (info.n_channels, info.kinematic_names.len());
        let mut out_first = 0;
        let mut i = 0;
        self.inner.pass(&mut |chunk: RowChunk<'_>| {
            // Cut the chunk around the left-out ranges; each kept piece is a
            // slice of it, no copy.
            let end = chunk.first + chunk.rows;
            let mut at = chunk.first;
            while at < end {
                while i < self.left_out.len() && self.left_out[i].end <= at {
                    i += 1;
                }
                let (keep_to, skip_to) = match self.left_out.get(i) {
                    Some(r) if r.start <= at => (at, r.end.min(end)),
                    Some(r) => (r.start.min(end), r.start.min(end)),
                    None => (end, end),
                };
                if keep_to > at {
                    let (a, b) = (at - chunk.first, keep_to - chunk.first);
                    visit(RowChunk {
                        first: out_first,
                        rows: b - a,
                        counts: if chunk.counts.is_empty() {
                            &[]
                        } else {
                            &chunk.counts[a * n..b * n]
                        },
                        features: if chunk.features.is_empty() {
                            &[]
                        } else {
                            &chunk.features[a * n..b * n]
                        },
                        kinematics: if chunk.kinematics.is_empty() {
                            &[]
                        } else {
                            &chunk.kinematics[a * k..b * k]
                        },
                    });
                    out_first += b - a;
                }
                at = skip_to.max(keep_to);
            }
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::bin_width::BinWidth;
    use crate::formats::block::Block;

    fn block(n_bins: usize) -> Block {
        Block {
            bin_width: BinWidth::from_us(20_000).unwrap(),
            n_bins,
            n_channels: 2,
            input: BinKind::Counts,
            counts: (0..2 * n_bins as u16).collect(),
            features: Vec::new(),
            kinematic_names: vec!["vel_x".into()],
            kinematics: Some(crate::linalg::Mat {
                rows: n_bins,
                cols: 1,
                data: (0..n_bins).map(|b| b as f64).collect(),
            }),
            trials: None,
            channel_labels: None,
            valid: None,
            click: None,
            notes: None,
        }
    }

    #[test]
    fn without_numbers_the_kept_rows_end_to_end() {
        let b = block(20);
        let w = Without::new(&b, vec![15..30, 3..6, 0..1]);
        assert_eq!(w.info().n_bins, 20 - 1 - 3 - 5);
        let mut rows = Vec::new();
        each_count_row(&w, 1, |t, c, x| rows.push((t, c[0], x[0]))).unwrap();
        let kept: Vec<usize> = (1..3).chain(6..15).collect();
        assert_eq!(rows.len(), kept.len());
        for (i, (t, c, x)) in rows.into_iter().enumerate() {
            assert_eq!((t, c, x), (i, 2 * kept[i] as u16, kept[i] as f64));
        }
    }

    #[test]
    fn the_window_looks_back_and_the_walk_finds_segments() {
        let mut w = RowWindow::new(BinKind::Counts, 1, 1, 3);
        for t in 0..5u16 {
            w.push(BinValues::Counts(&[t]), &[f64::from(t)]);
        }
        assert_eq!((w.counts(0)[0], w.counts(2)[0]), (4, 2));
        assert_eq!(w.kinematics(1)[0], 3.0);
        let mut s = SegmentWalk::new(vec![(5..8, 'b'), (0..2, 'a')]);
        let got: Vec<_> = (0..9).map(|t| s.at(t).map(|(_, c)| c)).collect();
        let a = Some('a');
        let b = Some('b');
        assert_eq!(got, [a, a, None, None, None, b, b, b, None]);
    }
}
