//! The profile file: a signature, a format version, a JSON header with the settings and
//! the small fitted statistics, binary little-endian `f64` sections for the large arrays
//! (the indexed rows, LOF state, calibration scores, the raw fitted rows and their
//! Gaussian for the replacement samplers), and a CRC-32 over all of it.
//!
//! ```text
//! 0   12 bytes  signature  \x89 K L T P R O F \r \n \x1a \n
//! 12  u32 LE    format version
//! 16  u64 LE    header length H
//! 24  H bytes   header (UTF-8 JSON)
//! ..  f64 LE    sections, in the order and lengths the header lists
//! ..  u32 LE    CRC-32 (IEEE) of every byte before it
//! ```
//!
//! The binary sections keep a million-row profile loading in well under a second; the
//! signature's `\r\n` and `\x1a` catch a file mangled by text-mode transfers; the checksum
//! catches truncation and edits.

use std::io::Write;
use std::path::Path;

use ndarray::{Array1, Array2};
use serde::{Deserialize, Serialize};

use super::{FeatureDistribution, Profile, ProfileSettings};
use crate::embedding::{Embedding, FittedEmbedding};
use crate::error::{Error, ProfileFault, Result};
use crate::neighbours::{BruteForceIndex, LocalOutlierFactor, NeighbourIndex};
use crate::stats::{CalibrationScores, CovarianceEstimate, MahalanobisModel};

/// The format's name, recorded in the header.
pub const FORMAT_NAME: &str = "kilter-profile";
/// The format version this build writes and reads.
pub const FORMAT_VERSION: u32 = 2;

const SIGNATURE: &[u8; 12] = b"\x89KLTPROF\r\n\x1a\n";
const PREAMBLE: usize = 12 + 4 + 8;

#[derive(Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
struct Header {
    format: String,
    version: u32,
    written_by: String,
    settings: ProfileSettings,
    feature_names: Vec<String>,
    named_features: bool,
    reference_rows: usize,
    fitted_rows: usize,
    embedded_dim: usize,
    embedding: FittedEmbedding,
    location: Vec<f64>,
    covariance: Vec<Vec<f64>>,
    shrinkage: Option<f64>,
    sections: Vec<Section>,
}

#[derive(Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
struct Section {
    name: String,
    len: usize,
}

const SECTION_NAMES: [&str; 8] = [
    "index_rows",
    "lof_k_distance",
    "lof_density",
    "calibration_mahalanobis",
    "calibration_knn",
    "feature_rows",
    "feature_location",
    "feature_covariance",
];

impl Profile {
    /// Serialises the profile to bytes.
    pub fn to_bytes(&self) -> Vec<u8> {
        let rows = self.index.rows();
        let features = &self.features;
        let feature_rows = features.rows().to_owned();
        let feature_covariance = features.covariance().as_standard_layout().to_owned();
        let sections: [&[f64]; 8] = [
            rows.as_slice().expect("index rows are in standard layout"),
            self.lof.k_distance(),
            self.lof.density(),
            self.calibration_mahalanobis.sorted(),
            self.calibration_knn.sorted(),
            feature_rows.as_slice().expect("standard layout"),
            features.location().as_slice().expect("contiguous"),
            feature_covariance.as_slice().expect("standard layout"),
        ];
        let header = Header {
            format: FORMAT_NAME.into(),
            version: FORMAT_VERSION,
            written_by: format!("kilter {}", env!("CARGO_PKG_VERSION")),
            settings: self.settings.clone(),
            feature_names: self.feature_names.clone(),
            named_features: self.named_features,
            reference_rows: self.reference_rows,
            fitted_rows: rows.nrows(),
            embedded_dim: rows.ncols(),
            embedding: self.embedding.clone(),
            location: self.estimate.location.to_vec(),
            covariance: self
                .estimate
                .covariance
                .outer_iter()
                .map(|r| r.to_vec())
                .collect(),
            shrinkage: self.estimate.shrinkage,
            sections: SECTION_NAMES
                .iter()
                .zip(sections.iter())
                .map(|(name, data)| Section {
                    name: (*name).into(),
                    len: data.len(),
                })
                .collect(),
        };
        let header = serde_json::to_vec(&header).expect("the header serialises");
        let body: usize = sections.iter().map(|s| s.len() * 8).sum();
        let mut out = Vec::with_capacity(PREAMBLE + header.len() + body + 4);
        out.extend_from_slice(SIGNATURE);
        out.extend_from_slice(&FORMAT_VERSION.to_le_bytes());
        out.extend_from_slice(&(header.len() as u64).to_le_bytes());
        out.extend_from_slice(&header);
        for section in sections {
            for v in section {
                out.extend_from_slice(&v.to_le_bytes());
            }
        }
        let crc = crc32fast::hash(&out);
        out.extend_from_slice(&crc.to_le_bytes());
        out
    }

    /// Writes the profile whole or not at all (a temporary file beside it, then a rename).
    pub fn save(&self, path: &Path) -> Result<()> {
        crate::output::write_atomically(path, |w| w.write_all(&self.to_bytes()))
    }

    /// Reads and validates a profile file.
    pub fn load(path: &Path) -> Result<Profile> {
        let bytes = std::fs::read(path).map_err(|e| Error::io(path, e))?;
        Profile::from_bytes(&bytes).map_err(|fault| Error::Profile {
            path: path.to_path_buf(),
            fault,
        })
    }

    /// Parses and validates profile bytes.
    pub fn from_bytes(bytes: &[u8]) -> std::result::Result<Profile, ProfileFault> {
        if bytes.len() < SIGNATURE.len() || &bytes[..SIGNATURE.len()] != SIGNATURE {
            return Err(ProfileFault::NotAProfile);
        }
        if bytes.len() < PREAMBLE + 4 {
            return Err(ProfileFault::Truncated);
        }
        let version = u32::from_le_bytes(bytes[12..16].try_into().expect("4 bytes"));
        if version != FORMAT_VERSION {
            return Err(ProfileFault::Version {
                found: version,
                supported: FORMAT_VERSION,
            });
        }
        let header_len = u64::from_le_bytes(bytes[16..24].try_into().expect("8 bytes"));
        let header_end = usize::try_from(header_len)
            .ok()
            .and_then(|h| h.checked_add(PREAMBLE))
            // The file holds at least PREAMBLE + 4 bytes (checked above), so this cannot
            // underflow; `end + 4` could overflow for a header length near usize::MAX.
            .filter(|&end| end <= bytes.len() - 4)
            .ok_or(ProfileFault::Truncated)?;
        let header: Header = serde_json::from_slice(&bytes[PREAMBLE..header_end])
            .map_err(|e| ProfileFault::Inconsistent(format!("header: {e}")))?;
        if header.sections.len() != SECTION_NAMES.len() {
            return Err(ProfileFault::Inconsistent(format!(
                "{} sections where {} belong",
                header.sections.len(),
                SECTION_NAMES.len()
            )));
        }
        let body: usize = header
            .sections
            .iter()
            .try_fold(0usize, |acc, s| {
                s.len.checked_mul(8).and_then(|b| acc.checked_add(b))
            })
            .ok_or(ProfileFault::Truncated)?;
        let expected_len = header_end
            .checked_add(body)
            .and_then(|v| v.checked_add(4))
            .ok_or(ProfileFault::Truncated)?;
        if bytes.len() < expected_len {
            return Err(ProfileFault::Truncated);
        }
        if bytes.len() > expected_len {
            return Err(ProfileFault::Inconsistent(format!(
                "{} bytes after the declared content",
                bytes.len() - expected_len
            )));
        }
        let stored_crc = u32::from_le_bytes(bytes[expected_len - 4..].try_into().expect("4 bytes"));
        if crc32fast::hash(&bytes[..expected_len - 4]) != stored_crc {
            return Err(ProfileFault::Checksum);
        }
        if header.format != FORMAT_NAME {
            return Err(ProfileFault::NotAProfile);
        }
        let mut sections = Vec::with_capacity(SECTION_NAMES.len());
        let mut at = header_end;
        for (section, expected) in header.sections.iter().zip(SECTION_NAMES) {
            if section.name != expected {
                return Err(ProfileFault::Inconsistent(format!(
                    "section \"{}\" where \"{expected}\" belongs",
                    section.name
                )));
            }
            let data: Vec<f64> = bytes[at..at + section.len * 8]
                .chunks_exact(8)
                .map(|c| f64::from_le_bytes(c.try_into().expect("8 bytes")))
                .collect();
            at += section.len * 8;
            sections.push(data);
        }
        build(header, sections)
    }
}

fn build(
    header: Header,
    mut sections: Vec<Vec<f64>>,
) -> std::result::Result<Profile, ProfileFault> {
    let bad = |what: &str| ProfileFault::Inconsistent(what.to_string());
    let mut header = header;
    header
        .embedding
        .prepare()
        .map_err(|e| ProfileFault::Inconsistent(format!("its encoder cannot be loaded: {e}")))?;
    let n = header.fitted_rows;
    let d = header.embedded_dim;
    header.embedding.validate().map_err(|e| bad(&e))?;
    if header.embedding.output_dim() != d
        || header.embedding.input_dim() != header.feature_names.len()
    {
        return Err(bad("the embedding does not match the declared dimensions"));
    }
    if header.location.len() != d
        || header.covariance.len() != d
        || header.covariance.iter().any(|r| r.len() != d)
    {
        return Err(bad("location or covariance has the wrong size"));
    }
    let feature_covariance = sections.pop().expect("eight sections");
    let feature_location = sections.pop().expect("eight sections");
    let feature_rows = sections.pop().expect("eight sections");
    let calibration_knn = sections.pop().expect("eight sections");
    let calibration_mahalanobis = sections.pop().expect("eight sections");
    let density = sections.pop().expect("eight sections");
    let k_distance = sections.pop().expect("eight sections");
    let rows = sections.pop().expect("eight sections");
    let p = header.feature_names.len();
    if feature_location.len() != p
        || feature_covariance.len() != p * p
        || p == 0
        || feature_rows.len() % p != 0
    {
        return Err(bad("the feature distribution has the wrong size"));
    }
    // `fitted_rows` comes from the header unchecked: the product must not overflow.
    if n.checked_mul(d) != Some(rows.len()) || k_distance.len() != n || density.len() != n {
        return Err(bad("the indexed rows do not match the declared shape"));
    }
    if calibration_mahalanobis.is_empty() || calibration_mahalanobis.len() != calibration_knn.len()
    {
        return Err(bad("calibration scores are missing or unequal in number"));
    }
    let all_finite = rows
        .iter()
        .chain(&k_distance)
        .chain(&density)
        .chain(&calibration_mahalanobis)
        .chain(&calibration_knn)
        .chain(&feature_rows)
        .chain(&feature_location)
        .chain(&feature_covariance)
        .chain(&header.location)
        .chain(header.covariance.iter().flatten())
        .all(|v| v.is_finite());
    if !all_finite {
        return Err(bad("non-finite values"));
    }
    let k = header.settings.k;
    if k == 0 || k > n {
        return Err(bad("k does not fit the number of indexed rows"));
    }
    let estimate = CovarianceEstimate {
        location: Array1::from(header.location),
        covariance: Array2::from_shape_fn((d, d), |(i, j)| header.covariance[i][j]),
        shrinkage: header.shrinkage,
    };
    let mahalanobis = MahalanobisModel::new(&estimate, n)
        .map_err(|_| bad("the covariance is not positive definite"))?;
    let index = BruteForceIndex::new(
        Array2::from_shape_vec((n, d), rows).map_err(|_| bad("indexed rows"))?,
    );
    debug_assert_eq!(index.len(), n);
    let lof =
        LocalOutlierFactor::from_parts(k_distance, density).ok_or_else(|| bad("LOF state"))?;
    let feature_rows = Array2::from_shape_vec((feature_rows.len() / p, p), feature_rows)
        .map_err(|_| bad("feature rows"))?;
    let features = FeatureDistribution::from_parts(
        feature_rows,
        Array1::from(feature_location),
        Array2::from_shape_vec((p, p), feature_covariance)
            .map_err(|_| bad("feature covariance"))?,
    )
    .ok_or_else(|| bad("the feature distribution"))?;
    Ok(Profile {
        settings: header.settings,
        feature_names: header.feature_names,
        named_features: header.named_features,
        reference_rows: header.reference_rows,
        embedding: header.embedding,
        estimate,
        mahalanobis,
        index,
        lof,
        calibration_mahalanobis: CalibrationScores::new(calibration_mahalanobis),
        calibration_knn: CalibrationScores::new(calibration_knn),
        features,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A preamble in this file's layout (signature, version, header length) over `rest`.
    fn preamble(header_len: u64, rest: &[u8]) -> Vec<u8> {
        let mut out = SIGNATURE.to_vec();
        out.extend_from_slice(&FORMAT_VERSION.to_le_bytes());
        out.extend_from_slice(&header_len.to_le_bytes());
        out.extend_from_slice(rest);
        out
    }

    /// Found by the `profile_bytes` fuzz target (fuzz/regressions/profile_bytes/; its
    /// first byte is the target's mode): a header length of 2^64 - 25 passed the bounds
    /// check by overflowing `end + 4`, and slicing the header then panicked.
    #[test]
    fn a_header_length_near_the_largest_integer_is_truncation() {
        let input = include_bytes!("../../fuzz/regressions/profile_bytes/header_length_overflow");
        assert!(matches!(
            Profile::from_bytes(&input[1..]),
            Err(ProfileFault::Truncated)
        ));
        for header_len in [u64::MAX, u64::MAX - 24, u64::MAX - 25, u64::MAX - 27] {
            let bytes = preamble(header_len, &[b'{'; 64]);
            assert!(
                matches!(Profile::from_bytes(&bytes), Err(ProfileFault::Truncated)),
                "header length {header_len}"
            );
        }
    }

    /// The seed profiles of the fuzz target (fitted by `kilter fit` on iris rows, see
    /// fuzz/make_seeds.py) must load: a seed this format refuses would leave the fuzzer
    /// stuck at the signature or the checksum. The first byte is the target's mode.
    #[test]
    fn the_fuzz_seed_profiles_load() {
        for seed in [
            &include_bytes!("../../fuzz/seeds/profile_bytes/standardize_lw_k3_as_is")[..],
            &include_bytes!("../../fuzz/seeds/profile_bytes/pca2_empirical_k2_in_sample_as_is")[..],
        ] {
            let profile = Profile::from_bytes(&seed[1..]).unwrap();
            assert_eq!(profile.feature_names().len(), 4);
        }
    }

    /// A header whose `fitted_rows` is 2^62 (checksum recomputed, so that it reaches the
    /// shape checks): `fitted_rows x embedded_dim` overflowed, a panic under overflow
    /// checks; it is an inconsistent profile.
    #[test]
    fn a_huge_declared_row_count_is_inconsistent() {
        let seed = &include_bytes!("../../fuzz/seeds/profile_bytes/standardize_lw_k3_as_is")[1..];
        let header_len = u64::from_le_bytes(seed[16..24].try_into().unwrap()) as usize;
        let header_end = PREAMBLE + header_len;
        let mut header: serde_json::Value =
            serde_json::from_slice(&seed[PREAMBLE..header_end]).unwrap();
        header["fitted_rows"] = serde_json::json!(1u64 << 62);
        let header = serde_json::to_vec(&header).unwrap();
        let mut bytes = preamble(header.len() as u64, &header);
        bytes.extend_from_slice(&seed[header_end..seed.len() - 4]);
        let crc = crc32fast::hash(&bytes);
        bytes.extend_from_slice(&crc.to_le_bytes());
        assert!(matches!(
            Profile::from_bytes(&bytes),
            Err(ProfileFault::Inconsistent(_))
        ));
    }
}
