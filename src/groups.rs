//! Feature groups: the players of a masking explanation.
//!
//! Masks switch whole groups on or off. By default each feature is its own group;
//! `--groups FILE` reads a JSON list of lists (0-based feature indices or feature names);
//! `--image HxW[xC] --patch P` makes one group per P x P patch of a row-major image with
//! channels last. Every feature belongs to at most one group; features in no group are
//! never masked.

use std::path::Path;

use serde_json::Value;

use crate::error::{Error, Result};

/// A partition of (some of) the features into groups.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Groups {
    members: Vec<Vec<usize>>,
    names: Vec<String>,
    features: usize,
}

impl Groups {
    /// One group per feature, named after it.
    pub fn singletons(feature_names: &[String]) -> Groups {
        Groups {
            members: (0..feature_names.len()).map(|i| vec![i]).collect(),
            names: feature_names.to_vec(),
            features: feature_names.len(),
        }
    }

    /// One group per feature, except that each block of columns in `blocks` (the one-hot
    /// encoding of one categorical variable) is one group, named after the block.
    pub fn singletons_and_blocks(feature_names: &[String], blocks: &[Vec<usize>]) -> Groups {
        let mut members = Vec::new();
        let mut names = Vec::new();
        for (i, name) in feature_names.iter().enumerate() {
            match blocks.iter().find(|b| b.contains(&i)) {
                Some(block) if block[0] == i => {
                    members.push(block.clone());
                    names.push(block_name(block, feature_names));
                }
                Some(_) => {}
                None => {
                    members.push(vec![i]);
                    names.push(name.clone());
                }
            }
        }
        Groups {
            members,
            names,
            features: feature_names.len(),
        }
    }

    /// Reads `--groups FILE`: `[[0, 1], [2], ...]` or `[["a", "b"], ["c"], ...]`.
    pub fn from_json_file(path: &Path, feature_names: &[String]) -> Result<Groups> {
        let text = std::fs::read_to_string(path).map_err(|e| Error::io(path, e))?;
        let bad = |detail: String| Error::InputMismatch {
            path: path.to_path_buf(),
            detail,
        };
        let value: Value =
            serde_json::from_str(&text).map_err(|e| bad(format!("not valid JSON: {e}")))?;
        let lists = value.as_array().ok_or_else(|| {
            bad("groups are a JSON list of lists of feature indices or names".into())
        })?;
        let mut members = Vec::with_capacity(lists.len());
        for (g, list) in lists.iter().enumerate() {
            let items = list
                .as_array()
                .ok_or_else(|| bad(format!("group {} is not a list", g + 1)))?;
            if items.is_empty() {
                return Err(bad(format!("group {} is empty", g + 1)));
            }
            let mut group = Vec::with_capacity(items.len());
            for item in items {
                let index = match item {
                    Value::Number(n) => n
                        .as_u64()
                        .map(|i| i as usize)
                        .filter(|&i| i < feature_names.len())
                        .ok_or_else(|| {
                            bad(format!(
                                "group {}: {n} is not a feature index (0 to {})",
                                g + 1,
                                feature_names.len() - 1
                            ))
                        })?,
                    Value::String(name) => feature_names
                        .iter()
                        .position(|f| f == name)
                        .ok_or_else(|| {
                            bad(format!("group {}: there is no feature \"{name}\"", g + 1))
                        })?,
                    other => {
                        return Err(bad(format!(
                            "group {}: {other} is neither a feature index nor a name",
                            g + 1
                        )))
                    }
                };
                group.push(index);
            }
            members.push(group);
        }
        let names = members
            .iter()
            .map(|m| {
                m.iter()
                    .map(|&i| feature_names[i].as_str())
                    .collect::<Vec<_>>()
                    .join("+")
            })
            .collect();
        Groups::new(members, names, feature_names.len()).map_err(bad)
    }

    /// One group per `patch x patch` block of a row-major `height x width x channels`
    /// image (channels last); edge patches are smaller when the sides are not multiples.
    pub fn image_patches(
        height: usize,
        width: usize,
        channels: usize,
        patch: usize,
        features: usize,
    ) -> Result<Groups> {
        if height == 0 || width == 0 || channels == 0 || patch == 0 {
            return Err(Error::InvalidSetting {
                flag: "--image",
                value: format!("{height}x{width}x{channels} with --patch {patch}"),
                expected: "positive sides, channels and patch size".into(),
            });
        }
        if height * width * channels != features {
            return Err(Error::InvalidSetting {
                flag: "--image",
                value: format!("{height}x{width}x{channels}"),
                expected: format!("an image of exactly {features} values, the input's width"),
            });
        }
        if patch >= height && patch >= width {
            return Err(Error::InvalidSetting {
                flag: "--patch",
                value: patch.to_string(),
                expected: format!(
                    "a side smaller than the {height}x{width} image; one patch covering the \
                     whole image leaves nothing to compare"
                ),
            });
        }
        let mut members = Vec::new();
        let mut names = Vec::new();
        for top in (0..height).step_by(patch) {
            for left in (0..width).step_by(patch) {
                let mut group = Vec::new();
                for r in top..(top + patch).min(height) {
                    for c in left..(left + patch).min(width) {
                        for ch in 0..channels {
                            group.push((r * width + c) * channels + ch);
                        }
                    }
                }
                members.push(group);
                names.push(format!("patch_r{top}_c{left}"));
            }
        }
        Groups::new(members, names, features).map_err(|detail| Error::InvalidSetting {
            flag: "--patch",
            value: patch.to_string(),
            expected: detail,
        })
    }

    fn new(
        members: Vec<Vec<usize>>,
        names: Vec<String>,
        features: usize,
    ) -> std::result::Result<Groups, String> {
        let mut owner = vec![None; features];
        for (g, group) in members.iter().enumerate() {
            for &i in group {
                if let Some(previous) = owner[i].replace(g) {
                    if previous == g {
                        return Err(format!("feature {i} appears twice in group {}", g + 1));
                    }
                    return Err(format!(
                        "feature {i} is in group {} and in group {}; a feature may be in one group only",
                        previous + 1,
                        g + 1
                    ));
                }
            }
        }
        if members.is_empty() {
            return Err("there are no groups".into());
        }
        Ok(Groups {
            members,
            names,
            features,
        })
    }

    /// Number of groups.
    pub fn len(&self) -> usize {
        self.members.len()
    }

    /// Whether there are none (never true for a constructed value).
    pub fn is_empty(&self) -> bool {
        self.members.is_empty()
    }

    /// Feature indices of group `g`.
    pub fn members(&self, g: usize) -> &[usize] {
        &self.members[g]
    }

    /// Group names, for records and reports.
    pub fn names(&self) -> &[String] {
        &self.names
    }

    /// Number of features the groups are drawn from.
    pub fn features(&self) -> usize {
        self.features
    }

    /// Sums per-feature values within each group.
    pub fn sum_within(&self, per_feature: &[f64]) -> Vec<f64> {
        self.members
            .iter()
            .map(|m| m.iter().map(|&i| per_feature[i]).sum())
            .collect()
    }
}

/// A one-hot block's name: the prefix its columns share, without a trailing separator
/// (`health_a`, `health_b` give `health`), else the column names joined with `+`.
fn block_name(block: &[usize], feature_names: &[String]) -> String {
    let first: Vec<char> = feature_names[block[0]].chars().collect();
    let shared = block[1..].iter().fold(first.len(), |len, &c| {
        feature_names[c]
            .chars()
            .zip(&first)
            .take(len)
            .take_while(|(a, b)| a == *b)
            .count()
    });
    let prefix: String = first[..shared].iter().collect();
    let prefix = prefix.trim_end_matches(['_', '.', '-', ' ', ':']);
    if prefix.chars().count() >= 2 {
        prefix.to_string()
    } else {
        block
            .iter()
            .map(|&c| feature_names[c].as_str())
            .collect::<Vec<_>>()
            .join("+")
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn image_patches_tile_the_image() {
        // 4 x 6 image, 1 channel, 2 x 2 patches: 2 rows x 3 columns of patches.
        let g = Groups::image_patches(4, 6, 1, 2, 24).unwrap();
        assert_eq!(g.len(), 6);
        assert_eq!(g.members(0), &[0, 1, 6, 7]);
        assert_eq!(g.members(5), &[16, 17, 22, 23]);
        // Channels last: pixel (0, 1) of a 2-channel image is features 2 and 3.
        let c = Groups::image_patches(2, 2, 2, 1, 8).unwrap();
        assert_eq!(c.members(1), &[2, 3]);
        assert!(Groups::image_patches(4, 6, 1, 2, 25).is_err());
    }

    #[test]
    fn overlapping_groups_are_refused() {
        let err =
            Groups::new(vec![vec![0, 1], vec![1]], vec!["a".into(), "b".into()], 2).unwrap_err();
        assert!(
            err.contains("feature 1 is in group 1 and in group 2"),
            "{err}"
        );
    }
}
