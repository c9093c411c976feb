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
//! ..  G bytes   the approximate index's graph (`index_graph_bytes`; 0 for exact indexes)
//! ..  u32 LE    CRC-32 (IEEE) of every byte before it
//! ```
//!
//! The binary sections keep a million-row profile loading in well under a second; the
//! signature's `\r\n` and `\x1a` catch a file mangled by text-mode transfers; the checksum
//! catches truncation and edits.

use std::io::{Read, Write};
use std::path::Path;

use ndarray::{Array1, Array2};
use rayon::prelude::*;
use serde::{Deserialize, Serialize};

use super::{FeatureDistribution, Profile, ProfileSettings};
use crate::embedding::{Embedding, FittedEmbedding};
use crate::error::{Error, ProfileFault, Result};
use crate::neighbours::{
    ApproximateIndex, BruteForceIndex, IndexChoice, LocalOutlierFactor, NeighbourIndex,
    ReferenceIndex, TreeIndex,
};
use crate::stats::{CalibrationScores, CovarianceEstimate, MahalanobisModel};

/// The format's name, recorded in the header.
pub const FORMAT_NAME: &str = "kilter-profile";
/// The format version this build writes and reads.
pub const FORMAT_VERSION: u32 = 3;

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
    index_recall: Option<f64>,
    index_graph_bytes: usize,
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

/// What a command needs of a profile. Scoring needs neither the raw fitted rows nor their
/// Gaussian (the replacement samplers' distribution), which are as large as the index, so
/// `score` skips that section and holds about one and a half times the indexed rows.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ProfileScope {
    /// Everything: `audit`, `baseline`.
    Complete,
    /// The embedding, statistics, index and calibration: `score`.
    Scoring,
}

/// Bytes read or written per step of a section.
const PIECE_BYTES: usize = 1 << 20;

/// A writer that keeps the CRC-32 of everything written through it.
struct HashingWriter<W: Write> {
    inner: W,
    hasher: crc32fast::Hasher,
}

impl<W: Write> Write for HashingWriter<W> {
    fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
        let n = self.inner.write(buf)?;
        self.hasher.update(&buf[..n]);
        Ok(n)
    }

    fn flush(&mut self) -> std::io::Result<()> {
        self.inner.flush()
    }
}

/// Why reading a profile stopped: the reader failed, or the bytes are not a valid profile.
enum ReadFailure {
    Io(std::io::Error),
    Fault(ProfileFault),
}

impl From<ProfileFault> for ReadFailure {
    fn from(fault: ProfileFault) -> Self {
        ReadFailure::Fault(fault)
    }
}

/// Reads exactly `buffer.len()` bytes; the end of the source is truncation.
fn read_exact(source: &mut impl Read, buffer: &mut [u8]) -> std::result::Result<(), ReadFailure> {
    source.read_exact(buffer).map_err(|e| match e.kind() {
        std::io::ErrorKind::UnexpectedEof => ReadFailure::Fault(ProfileFault::Truncated),
        _ => ReadFailure::Io(e),
    })
}

impl Profile {
    /// Serialises the profile to bytes.
    pub fn to_bytes(&self) -> Vec<u8> {
        let mut out = Vec::new();
        self.write_to(&mut out)
            .expect("writing to memory does not fail");
        out
    }

    /// Writes the profile, a section at a time (no copy of the large arrays is made).
    pub fn write_to(&self, out: impl Write) -> std::io::Result<()> {
        let rows = self.index.rows();
        let graph = match &self.index {
            ReferenceIndex::Approximate(index) => index.graph_bytes(),
            ReferenceIndex::Exact(_) | ReferenceIndex::Tree(_) => Vec::new(),
        };
        let features = self.features.as_ref().ok_or_else(|| {
            std::io::Error::other("a profile loaded for scoring alone cannot be saved")
        })?;
        let index_rows = rows.as_standard_layout();
        let feature_rows = features.rows();
        let feature_rows = feature_rows.as_standard_layout();
        let feature_covariance = features.covariance().as_standard_layout();
        let sections: [&[f64]; 8] = [
            index_rows.as_slice().expect("standard layout"),
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
            index_recall: self.index_recall,
            index_graph_bytes: graph.len(),
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
        let mut out = HashingWriter {
            inner: out,
            hasher: crc32fast::Hasher::new(),
        };
        out.write_all(SIGNATURE)?;
        out.write_all(&FORMAT_VERSION.to_le_bytes())?;
        out.write_all(&(header.len() as u64).to_le_bytes())?;
        out.write_all(&header)?;
        let mut piece = Vec::with_capacity(PIECE_BYTES);
        for section in sections {
            for values in section.chunks(PIECE_BYTES / 8) {
                piece.clear();
                for v in values {
                    piece.extend_from_slice(&v.to_le_bytes());
                }
                out.write_all(&piece)?;
            }
        }
        out.write_all(&graph)?;
        let crc = out.hasher.clone().finalize();
        out.inner.write_all(&crc.to_le_bytes())?;
        out.flush()
    }

    /// Writes the profile whole or not at all (a temporary file beside it, then a rename).
    pub fn save(&self, path: &Path) -> Result<()> {
        crate::output::write_atomically(path, |w| self.write_to(w))
    }

    /// Reads and validates a whole profile file.
    pub fn load(path: &Path) -> Result<Profile> {
        Profile::load_scoped(path, ProfileScope::Complete)
    }

    /// Reads and validates a profile file, keeping what `scope` needs. The file is read
    /// once, sequentially, a piece at a time; the checksum covers every byte either way.
    pub fn load_scoped(path: &Path, scope: ProfileScope) -> Result<Profile> {
        let fault = |fault| Error::Profile {
            path: path.to_path_buf(),
            fault,
        };
        let file = std::fs::File::open(path).map_err(|e| Error::io(path, e))?;
        let length = file.metadata().map_err(|e| Error::io(path, e))?.len();
        // A buffer well under a piece: the preamble and header go through it, while the
        // sections' pieces, larger than the buffer, bypass it and go straight from the file
        // into their storage (one copy, not two).
        let reader = std::io::BufReader::with_capacity(PIECE_BYTES / 16, file);
        read_profile(reader, length, scope).map_err(|failure| match failure {
            ReadFailure::Io(e) => Error::io(path, e),
            ReadFailure::Fault(f) => fault(f),
        })
    }

    /// Parses and validates profile bytes.
    pub fn from_bytes(bytes: &[u8]) -> std::result::Result<Profile, ProfileFault> {
        read_profile(bytes, bytes.len() as u64, ProfileScope::Complete).map_err(|failure| {
            match failure {
                ReadFailure::Io(_) => ProfileFault::Truncated,
                ReadFailure::Fault(f) => f,
            }
        })
    }
}

/// Reads a profile of `length` bytes from `source`. Every length the header declares is
/// checked against `length` before anything that large is allocated.
fn read_profile(
    mut source: impl Read,
    length: u64,
    scope: ProfileScope,
) -> std::result::Result<Profile, ReadFailure> {
    let mut preamble = [0u8; PREAMBLE];
    if length < SIGNATURE.len() as u64 {
        return Err(ProfileFault::NotAProfile.into());
    }
    read_exact(&mut source, &mut preamble[..SIGNATURE.len()])?;
    if &preamble[..SIGNATURE.len()] != SIGNATURE {
        return Err(ProfileFault::NotAProfile.into());
    }
    if length < (PREAMBLE + 4) as u64 {
        return Err(ProfileFault::Truncated.into());
    }
    read_exact(&mut source, &mut preamble[SIGNATURE.len()..])?;
    let version = u32::from_le_bytes(preamble[12..16].try_into().expect("4 bytes"));
    if version != FORMAT_VERSION {
        return Err(ProfileFault::Version {
            found: version,
            supported: FORMAT_VERSION,
        }
        .into());
    }
    let header_len = u64::from_le_bytes(preamble[16..24].try_into().expect("8 bytes"));
    // `length >= PREAMBLE + 4` here; `end + 4` could overflow for a header length near
    // the largest integer, `length - 4` cannot.
    let header_end = header_len
        .checked_add(PREAMBLE as u64)
        .filter(|&end| end <= length - 4)
        .ok_or(ProfileFault::Truncated)?;
    let mut header_bytes = vec![0u8; (header_end - PREAMBLE as u64) as usize];
    read_exact(&mut source, &mut header_bytes)?;
    let mut hasher = crc32fast::Hasher::new();
    hasher.update(&preamble);
    hasher.update(&header_bytes);
    let header: Header = serde_json::from_slice(&header_bytes)
        .map_err(|e| ProfileFault::Inconsistent(format!("header: {e}")))?;
    drop(header_bytes);
    if header.sections.len() != SECTION_NAMES.len() {
        return Err(ProfileFault::Inconsistent(format!(
            "{} sections where {} belong",
            header.sections.len(),
            SECTION_NAMES.len()
        ))
        .into());
    }
    let body = header
        .sections
        .iter()
        .try_fold(0u64, |acc, s| {
            (s.len as u64)
                .checked_mul(8)
                .and_then(|b| acc.checked_add(b))
        })
        .ok_or(ProfileFault::Truncated)?;
    let expected_len = header_end
        .checked_add(body)
        .and_then(|v| v.checked_add(header.index_graph_bytes as u64))
        .and_then(|v| v.checked_add(4))
        .ok_or(ProfileFault::Truncated)?;
    if length < expected_len {
        return Err(ProfileFault::Truncated.into());
    }
    if length > expected_len {
        return Err(ProfileFault::Inconsistent(format!(
            "{} bytes after the declared content",
            length - expected_len
        ))
        .into());
    }
    let mut sections = Vec::with_capacity(SECTION_NAMES.len());
    let mut piece = vec![0u8; PIECE_BYTES];
    for (section, expected) in header.sections.iter().zip(SECTION_NAMES) {
        if section.name != expected {
            return Err(ProfileFault::Inconsistent(format!(
                "section \"{}\" where \"{expected}\" belongs",
                section.name
            ))
            .into());
        }
        let keep = scope == ProfileScope::Complete || expected != "feature_rows";
        if keep {
            // Read straight into the values' storage, a piece at a time so that the checksum
            // reads each piece while it is still in cache; the file is little-endian.
            let mut data: Vec<f64> = crate::memory::zeroed_vec(section.len);
            for piece in bytemuck::cast_slice_mut::<f64, u8>(&mut data).chunks_mut(PIECE_BYTES) {
                read_exact(&mut source, piece)?;
                hasher.update(piece);
            }
            if cfg!(target_endian = "big") {
                for v in &mut data {
                    *v = f64::from_bits(u64::from_le(v.to_bits()));
                }
            }
            sections.push(data);
        } else {
            let mut left = section.len * 8;
            while left > 0 {
                let step = left.min(PIECE_BYTES);
                read_exact(&mut source, &mut piece[..step])?;
                hasher.update(&piece[..step]);
                left -= step;
            }
            sections.push(Vec::new());
        }
    }
    let mut graph = vec![0u8; header.index_graph_bytes];
    read_exact(&mut source, &mut graph)?;
    hasher.update(&graph);
    let mut stored = [0u8; 4];
    read_exact(&mut source, &mut stored)?;
    if hasher.finalize() != u32::from_le_bytes(stored) {
        return Err(ProfileFault::Checksum.into());
    }
    if header.format != FORMAT_NAME {
        return Err(ProfileFault::NotAProfile.into());
    }
    // The header repeats the version; a file whose two copies disagree was not written by
    // this format either.
    if header.version != FORMAT_VERSION {
        return Err(ProfileFault::Version {
            found: header.version,
            supported: FORMAT_VERSION,
        }
        .into());
    }
    Ok(build(header, sections, &graph, scope)?)
}

/// Whether every value is finite, checked in parallel blocks: the row sections of a large
/// profile hold hundreds of millions of values.
fn all_finite(values: &[f64]) -> bool {
    values
        .par_chunks(1 << 16)
        .all(|block| block.iter().all(|v| v.is_finite()))
}

fn build(
    header: Header,
    mut sections: Vec<Vec<f64>>,
    graph: &[u8],
    scope: ProfileScope,
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
        || !feature_rows.len().is_multiple_of(p)
        || (scope == ProfileScope::Complete && feature_rows.is_empty())
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
    let all_finite = [
        &rows,
        &k_distance,
        &density,
        &calibration_mahalanobis,
        &calibration_knn,
        &feature_rows,
        &feature_location,
        &feature_covariance,
        &header.location,
    ]
    .into_iter()
    .all(|values| all_finite(values))
        && header.covariance.iter().flatten().all(|v| v.is_finite());
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
    let rows = Array2::from_shape_vec((n, d), rows).map_err(|_| bad("indexed rows"))?;
    let index_fault = |e: Error| ProfileFault::Inconsistent(format!("its neighbour index: {e}"));
    let index = match header.settings.index {
        IndexChoice::Exact if graph.is_empty() => ReferenceIndex::Exact(BruteForceIndex::new(rows)),
        IndexChoice::Tree if graph.is_empty() => {
            ReferenceIndex::Tree(TreeIndex::new(rows).map_err(index_fault)?)
        }
        IndexChoice::Approximate(settings) => ReferenceIndex::Approximate(
            ApproximateIndex::from_graph_bytes(rows, graph, settings).map_err(index_fault)?,
        ),
        _ => return Err(bad("the neighbour index does not match its stored state")),
    };
    let lof =
        LocalOutlierFactor::from_parts(k_distance, density).ok_or_else(|| bad("LOF state"))?;
    let features = match scope {
        ProfileScope::Scoring => None,
        ProfileScope::Complete => {
            let feature_rows = Array2::from_shape_vec((feature_rows.len() / p, p), feature_rows)
                .map_err(|_| bad("feature rows"))?;
            Some(
                FeatureDistribution::from_parts(
                    feature_rows,
                    Array1::from(feature_location),
                    Array2::from_shape_vec((p, p), feature_covariance)
                        .map_err(|_| bad("feature covariance"))?,
                )
                .ok_or_else(|| bad("the feature distribution"))?,
            )
        }
    };
    Ok(Profile {
        settings: header.settings,
        feature_names: header.feature_names,
        named_features: header.named_features,
        reference_rows: header.reference_rows,
        embedding: header.embedding,
        estimate,
        mahalanobis,
        index,
        index_recall: header.index_recall,
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
        // Written under format version 2; the version is brought up to date so that the
        // header length is what is tested.
        let mut input =
            include_bytes!("../../fuzz/regressions/profile_bytes/header_length_overflow")[1..]
                .to_vec();
        input[12..16].copy_from_slice(&FORMAT_VERSION.to_le_bytes());
        assert!(matches!(
            Profile::from_bytes(&input),
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
