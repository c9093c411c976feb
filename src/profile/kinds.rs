//! What kind of values each raw feature takes, read off the fitted reference rows.
//!
//! A replacement draw or a deletion fill is only "like the data" if it is a value the
//! column can take: a Gaussian draw of 0.37 for a yes/no column, or of 2.6 visits for a
//! count, is itself off the data. kilter reads the kinds from the fitted rows (stored in
//! the profile), so every command that loads them sees the same kinds:
//!
//! - `constant`: one distinct value;
//! - `binary`: exactly two distinct values;
//! - `integer`: whole numbers only, more than two distinct values (counts, ordinal
//!   codes, whole-unit measurements);
//! - `continuous`: anything else;
//! - a `one-hot` block: two or more adjacent 0/1 columns of which no row has two at 1,
//!   and either every row has exactly one at 1 (a complete encoding) or the names share a
//!   prefix of at least two characters (an encoding with its reference level left out,
//!   where an all-zero row is that level).
//!
//! The rules are the project's own; the idea that replacement values should respect a
//! column's support is common practice.

use ndarray::{ArrayView1, ArrayView2};
use serde::{Deserialize, Serialize};

/// The kind of one raw feature.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum FeatureKind {
    Continuous,
    Integer,
    Binary,
    Constant,
    /// A member of a one-hot block (the block's index in [`FeatureKinds::blocks`]).
    OneHot(usize),
}

/// One one-hot block: its columns, and whether an all-zero row is a level of its own.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct OneHotBlock {
    pub columns: Vec<usize>,
    /// True when the reference level was left out (rows may have no column at 1).
    pub has_reference_level: bool,
}

/// The kinds of every raw feature, with the observed range and values they need.
#[derive(Debug, Clone, PartialEq)]
pub struct FeatureKinds {
    kinds: Vec<FeatureKind>,
    blocks: Vec<OneHotBlock>,
    /// Smallest and largest fitted value of each column.
    range: Vec<(f64, f64)>,
    /// Whether each column is coarse: an integer column whose whole-number steps are large
    /// against its spread (standard deviation at most [`COARSE_SD`] units).
    coarse: Vec<bool>,
}

/// An integer column whose standard deviation is at most this many units is coarse: a
/// whole-number step is a tenth of its spread or more, so 2.6 of it (visits, repairs, a
/// score from 1 to 5) is not a value it takes and a Gaussian models it poorly. With a
/// larger spread (99.7 mg of a whole-milligram measurement with a spread of 14 mg) the
/// steps are fine and the column is as good as continuous. The threshold is kilter's
/// choice.
pub const COARSE_SD: f64 = 10.0;

impl FeatureKinds {
    /// Reads the kinds off the fitted rows; `names` find the shared prefix of a one-hot
    /// block whose reference level was left out.
    pub fn detect(rows: ArrayView2<'_, f64>, names: &[String]) -> FeatureKinds {
        let d = rows.ncols();
        let mut range = Vec::with_capacity(d);
        let mut kinds = Vec::with_capacity(d);
        let mut coarse = Vec::with_capacity(d);
        for column in rows.columns() {
            let n = column.len().max(1) as f64;
            let mean = column.sum() / n;
            let sd = (column.iter().map(|v| (v - mean) * (v - mean)).sum::<f64>() / n).sqrt();
            coarse.push(sd <= COARSE_SD);
            let (low, high) = column
                .iter()
                .fold((f64::INFINITY, f64::NEG_INFINITY), |(l, h), &v| {
                    (l.min(v), h.max(v))
                });
            range.push((low, high));
            let two_valued = column.iter().all(|&v| v == low || v == high);
            let kind = if low == high {
                FeatureKind::Constant
            } else if two_valued {
                FeatureKind::Binary
            } else if column.iter().all(|v| v.fract() == 0.0) {
                FeatureKind::Integer
            } else {
                FeatureKind::Continuous
            };
            kinds.push(kind);
        }
        let zero_one: Vec<bool> = (0..d)
            .map(|c| kinds[c] == FeatureKind::Binary && range[c] == (0.0, 1.0))
            .collect();
        let mut blocks = Vec::new();
        let mut start = 0;
        while start < d {
            // The longest run of adjacent 0/1 columns from `start` with no row at 1 twice.
            let mut end = start;
            while end < d && zero_one[end] && exclusive(rows, start, end + 1) {
                end += 1;
            }
            if end - start >= 2 {
                let complete = rows
                    .rows()
                    .into_iter()
                    .all(|r| r.iter().skip(start).take(end - start).sum::<f64>() == 1.0);
                let prefixed = shared_prefix(&names[start..end]) >= 2;
                if complete || prefixed {
                    let block = blocks.len();
                    for kind in &mut kinds[start..end] {
                        *kind = FeatureKind::OneHot(block);
                    }
                    blocks.push(OneHotBlock {
                        columns: (start..end).collect(),
                        has_reference_level: !complete,
                    });
                }
            }
            start = end.max(start + 1);
        }
        FeatureKinds {
            kinds,
            blocks,
            range,
            coarse,
        }
    }

    /// Why a Gaussian would model these features poorly, or `None` if it would not:
    /// the binary columns, the coarse integer columns and the one-hot blocks.
    pub fn poorly_gaussian(&self, names: &[String]) -> Option<String> {
        let columns = |pick: &dyn Fn(usize) -> bool| -> Vec<&str> {
            (0..self.kinds.len())
                .filter(|&c| pick(c))
                .map(|c| names[c].as_str())
                .collect()
        };
        let binary = columns(&|c| self.kinds[c] == FeatureKind::Binary);
        let counts = columns(&|c| self.kinds[c] == FeatureKind::Integer && self.coarse[c]);
        self.describe(&[("binary", binary), ("coarse integer", counts)], names)
    }

    /// "LABEL a, b; ...; one-hot (x, y, z)" over the non-empty lists and every block.
    fn describe(&self, lists: &[(&str, Vec<&str>)], names: &[String]) -> Option<String> {
        let mut parts: Vec<String> = lists
            .iter()
            .filter(|(_, columns)| !columns.is_empty())
            .map(|(label, columns)| format!("{label} {}", abbreviated(columns)))
            .collect();
        for block in &self.blocks {
            let columns: Vec<&str> = block.columns.iter().map(|&c| names[c].as_str()).collect();
            parts.push(format!("one-hot ({})", columns.join(", ")));
        }
        (!parts.is_empty()).then(|| parts.join("; "))
    }

    /// `d` continuous features: no constraint on any value.
    pub fn continuous(d: usize) -> FeatureKinds {
        FeatureKinds {
            kinds: vec![FeatureKind::Continuous; d],
            blocks: Vec::new(),
            range: vec![(f64::NEG_INFINITY, f64::INFINITY); d],
            coarse: vec![false; d],
        }
    }

    /// The kind of every feature.
    pub fn kinds(&self) -> &[FeatureKind] {
        &self.kinds
    }

    /// The one-hot blocks.
    pub fn blocks(&self) -> &[OneHotBlock] {
        &self.blocks
    }

    /// Whether every feature is continuous (no draw needs to be made valid).
    pub fn all_continuous(&self) -> bool {
        self.kinds.iter().all(|k| *k == FeatureKind::Continuous)
    }

    /// Whether `value` is one the column can take: any number for a continuous column or
    /// an integer one that is not coarse (how far it lies is the scores' business; 99.7 mg
    /// of a whole-milligram measurement is not a different kind of value), a whole number
    /// within the fitted range for a coarse integer one, one of the observed values
    /// otherwise.
    pub fn admits(&self, column: usize, value: f64) -> bool {
        let (low, high) = self.range[column];
        match self.kinds[column] {
            FeatureKind::Continuous => value.is_finite(),
            FeatureKind::Integer if !self.coarse[column] => value.is_finite(),
            FeatureKind::Integer => (low..=high).contains(&value) && value.fract() == 0.0,
            FeatureKind::Binary | FeatureKind::Constant | FeatureKind::OneHot(_) => {
                value == low || value == high
            }
        }
    }

    /// Whether every value of `row` is one its column takes, one-hot blocks holding at
    /// most one level (exactly one where the encoding is complete).
    pub fn row_is_valid(&self, row: ArrayView1<'_, f64>) -> bool {
        row.iter().enumerate().all(|(c, &v)| self.admits(c, v))
            && self.blocks.iter().all(|b| {
                let on: f64 = b.columns.iter().map(|&c| row[c]).sum();
                on == 1.0 || (on == 0.0 && b.has_reference_level)
            })
    }

    /// Makes the features not `kept` in `row` valid values of their kind: integers
    /// rounded and held to the fitted range, binary columns set to the nearer of their
    /// two values, and each one-hot block given exactly one level (the largest drawn
    /// value wins, an all-zero level counting as `1 - Σ` where the reference level was
    /// left out; a block with a kept column at 1 keeps that level).
    pub fn make_valid(&self, row: &mut [f64], kept: &[bool]) {
        for (c, kind) in self.kinds.iter().enumerate() {
            if kept[c] {
                continue;
            }
            let (low, high) = self.range[c];
            row[c] = match kind {
                FeatureKind::Continuous | FeatureKind::OneHot(_) => continue,
                FeatureKind::Integer => row[c].round().clamp(low, high),
                FeatureKind::Binary | FeatureKind::Constant => {
                    if (row[c] - low).abs() <= (high - row[c]).abs() {
                        low
                    } else {
                        high
                    }
                }
            };
        }
        for block in &self.blocks {
            let masked: Vec<usize> = block
                .columns
                .iter()
                .copied()
                .filter(|&c| !kept[c])
                .collect();
            if masked.is_empty() {
                continue;
            }
            let kept_level = block.columns.iter().any(|&c| kept[c] && row[c] == 1.0);
            let drawn_sum: f64 = block.columns.iter().map(|&c| row[c]).sum();
            let winner = masked
                .iter()
                .copied()
                .max_by(|&a, &b| row[a].total_cmp(&row[b]).then(b.cmp(&a)));
            let none_wins =
                block.has_reference_level && winner.is_some_and(|w| 1.0 - drawn_sum > row[w]);
            let all_kept_zero = block.columns.iter().all(|&c| !kept[c] || row[c] == 0.0);
            for &c in &masked {
                row[c] = 0.0;
            }
            // A complete encoding needs one level at 1: a masked column takes it unless a
            // kept column holds it already.
            let needs_one = !block.has_reference_level && all_kept_zero;
            if !kept_level && (needs_one || !none_wins) {
                if let Some(w) = winner {
                    row[w] = 1.0;
                }
            }
        }
    }

    /// A line for people: "binary: idp, physlim; integer: mdvis; one-hot: (hlthg, hlthf,
    /// hlthp)"; `None` when every feature is continuous.
    pub fn summary(&self, names: &[String]) -> Option<String> {
        let listed = |kind: FeatureKind| -> Vec<&str> {
            (0..self.kinds.len())
                .filter(|&c| self.kinds[c] == kind)
                .map(|c| names[c].as_str())
                .collect()
        };
        self.describe(
            &[
                ("binary", listed(FeatureKind::Binary)),
                ("integer", listed(FeatureKind::Integer)),
                ("constant", listed(FeatureKind::Constant)),
            ],
            names,
        )
    }
}

/// At most six names, then a count.
fn abbreviated(names: &[&str]) -> String {
    if names.len() <= 6 {
        names.join(", ")
    } else {
        format!("{} and {} more", names[..5].join(", "), names.len() - 5)
    }
}

/// Whether no row has two of the columns `start..end` at 1.
fn exclusive(rows: ArrayView2<'_, f64>, start: usize, end: usize) -> bool {
    rows.rows()
        .into_iter()
        .all(|r| r.iter().skip(start).take(end - start).sum::<f64>() <= 1.0)
}

/// Length in characters of the prefix every name shares.
fn shared_prefix(names: &[String]) -> usize {
    let first: Vec<char> = names[0].chars().collect();
    names[1..].iter().fold(first.len(), |len, name| {
        name.chars()
            .zip(&first)
            .take(len)
            .take_while(|(a, b)| a == *b)
            .count()
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    fn names(list: &[&str]) -> Vec<String> {
        list.iter().map(|s| s.to_string()).collect()
    }

    #[test]
    fn kinds_are_read_off_the_values() {
        let rows = array![
            [0.5, 1.0, 3.0, 1.0, 0.0, 0.0, 7.0],
            [1.5, 0.0, 0.0, 0.0, 1.0, 0.0, 7.0],
            [2.5, 1.0, 12.0, 0.0, 0.0, 1.0, 7.0],
            [0.1, 0.0, 1.0, 0.0, 0.0, 0.0, 7.0],
        ];
        let kinds = FeatureKinds::detect(
            rows.view(),
            &names(&[
                "x", "yes", "visits", "health_a", "health_b", "health_c", "k",
            ]),
        );
        assert_eq!(
            kinds.kinds(),
            &[
                FeatureKind::Continuous,
                FeatureKind::Binary,
                FeatureKind::Integer,
                FeatureKind::OneHot(0),
                FeatureKind::OneHot(0),
                FeatureKind::OneHot(0),
                FeatureKind::Constant,
            ]
        );
        assert!(kinds.blocks()[0].has_reference_level);
    }

    #[test]
    fn adjacent_exclusive_columns_without_a_shared_name_are_not_a_block_unless_complete() {
        let rows = array![[1.0, 0.0], [0.0, 1.0], [0.0, 0.0]];
        let kinds = FeatureKinds::detect(rows.view(), &names(&["retired", "student"]));
        assert!(kinds.blocks().is_empty());
        let complete = array![[1.0, 0.0], [0.0, 1.0], [0.0, 1.0]];
        let kinds = FeatureKinds::detect(complete.view(), &names(&["retired", "student"]));
        assert_eq!(kinds.blocks().len(), 1);
        assert!(!kinds.blocks()[0].has_reference_level);
    }

    #[test]
    fn drawn_values_become_values_of_their_kind() {
        let rows = array![
            [0.5, 1.0, 3.0, 1.0, 0.0, 0.0],
            [1.5, 0.0, 0.0, 0.0, 1.0, 0.0],
            [2.5, 1.0, 12.0, 0.0, 0.0, 1.0],
            [0.1, 0.0, 1.0, 0.0, 0.0, 0.0],
        ];
        let kinds = FeatureKinds::detect(
            rows.view(),
            &names(&["x", "yes", "visits", "health_a", "health_b", "health_c"]),
        );
        let none_kept = [false; 6];
        let mut drawn = [0.37, 0.62, 14.6, 0.2, 0.5, 0.1];
        kinds.make_valid(&mut drawn, &none_kept);
        assert_eq!(drawn, [0.37, 1.0, 12.0, 0.0, 1.0, 0.0]);
        // The left-out level wins when the drawn values leave most of the mass to it.
        let mut drawn = [0.0, 0.2, -3.0, 0.1, 0.2, 0.05];
        kinds.make_valid(&mut drawn, &none_kept);
        assert_eq!(drawn, [0.0, 0.0, 0.0, 0.0, 0.0, 0.0]);
        // A kept column at 1 holds the block's level.
        let kept = [true, true, true, true, false, false];
        let mut drawn = [0.0, 1.0, 3.0, 1.0, 0.9, 0.4];
        kinds.make_valid(&mut drawn, &kept);
        assert_eq!(&drawn[3..], &[1.0, 0.0, 0.0]);
        for (c, v) in drawn.iter().enumerate() {
            assert!(kinds.admits(c, *v), "column {c}: {v}");
        }
    }
}
