//! The profile file: a signature, a format version, a JSON header with the settings and
//! the small fitted statistics, binary little-endian `f64` sections for the large arrays
//! (the indexed rows, LOF state, calibration scores, the raw fitted rows and their
//! Gaussian for the replacement samplers), and two CRC-32 checksums.
//!
//! ```text
//! 0   12 bytes  signature  \x89 K L T P R O F \r \n \x1a \n
//! 12  u32 LE    format version
//! 16  u64 LE    header length H
//! 24  H bytes   header (UTF-8 JSON)
//! ..  f64 LE    sections, in the order and lengths the header lists
//! ..  G bytes   the approximate index's graph (`index_graph_bytes`; 0 for exact indexes)
//! ..  u32 LE    CRC-32 (IEEE) of the `feature_rows` section
//! ..  u32 LE    CRC-32 (IEEE) of every byte before it but the `feature_rows` section's
//! ```
//!
//! The binary sections keep a million-row profile loading in well under a second; the
//! signature's `\r\n` and `\x1a` catch a file mangled by text-mode transfers; the checksums
//! catch truncation and edits. The raw fitted rows have a checksum of their own so that
//! `score`, which does not use them, can seek past them instead of reading them: they are
//! as large as the indexed rows. Everything a command uses is checked before it is used.

use std::io::{Read, Seek, SeekFrom, Write};
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
/// The format version this build writes and reads. (`lof_k_distance` holds each fitted
/// row's k-distance over distinct locations; on fitted rows without duplicates that is the
/// k-distance earlier builds wrote, and with duplicates only the values differ.)
pub const FORMAT_VERSION: u32 = 4;

const SIGNATURE: &[u8; 12] = b"\x89KLTPROF\r\n\x1a\n";
const PREAMBLE: usize = 12 + 4 + 8;
/// The two checksums at the end.
const TRAILER: usize = 4 + 4;

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
/// `score` seeks past that section unread and holds about one and a half times the indexed rows.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ProfileScope {
    /// Everything: `audit`, `baseline`.
    Complete,
    /// The embedding, statistics, index and calibration: `score`.
    Scoring,
}

/// Bytes read or written per step of a section.
const PIECE_BYTES: usize = 1 << 20;

/// The section with a checksum of its own, which `score` skips.
const SKIPPABLE_SECTION: &str = "feature_rows";

/// A writer that keeps the CRC-32 of everything written through it: of the skippable
/// section while `aside` is set, of everything else otherwise.
struct HashingWriter<W: Write> {
    inner: W,
    hasher: crc32fast::Hasher,
    aside_hasher: crc32fast::Hasher,
    aside: bool,
}

impl<W: Write> Write for HashingWriter<W> {
    fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
        let n = self.inner.write(buf)?;
        let hasher = if self.aside {
            &mut self.aside_hasher
        } else {
            &mut self.hasher
        };
        hasher.update(&buf[..n]);
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
            aside_hasher: crc32fast::Hasher::new(),
            aside: false,
        };
        out.write_all(SIGNATURE)?;
        out.write_all(&FORMAT_VERSION.to_le_bytes())?;
        out.write_all(&(header.len() as u64).to_le_bytes())?;
        out.write_all(&header)?;
        let mut piece = Vec::with_capacity(PIECE_BYTES);
        for (section, name) in sections.into_iter().zip(SECTION_NAMES) {
            out.aside = name == SKIPPABLE_SECTION;
            for values in section.chunks(PIECE_BYTES / 8) {
                piece.clear();
                for v in values {
                    piece.extend_from_slice(&v.to_le_bytes());
                }
                out.write_all(&piece)?;
            }
        }
        out.aside = false;
        out.write_all(&graph)?;
        let aside_crc = out.aside_hasher.clone().finalize();
        out.write_all(&aside_crc.to_le_bytes())?;
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
        let source = std::io::Cursor::new(bytes);
        read_profile(source, bytes.len() as u64, ProfileScope::Complete).map_err(|failure| {
            match failure {
                ReadFailure::Io(_) => ProfileFault::Truncated,
                ReadFailure::Fault(f) => f,
            }
        })
    }
}

/// Recomputes the two checksums at the end of profile bytes in place, for tools that edit a
/// profile on purpose (tests of what lies behind the checksums, the fuzzer). Returns false,
/// changing nothing, where the layout cannot be followed that far: too short, a header that
/// is not JSON with a list of sections, or sections that do not fit.
pub fn reseal(bytes: &mut [u8]) -> bool {
    let Some(body) = bytes.len().checked_sub(TRAILER).filter(|&b| b >= PREAMBLE) else {
        return false;
    };
    let header_len = u64::from_le_bytes(bytes[16..24].try_into().expect("8 bytes"));
    let Some(header_end) = usize::try_from(header_len)
        .ok()
        .and_then(|h| h.checked_add(PREAMBLE))
        .filter(|&end| end <= body)
    else {
        return false;
    };
    let Ok(header) = serde_json::from_slice::<serde_json::Value>(&bytes[PREAMBLE..header_end])
    else {
        return false;
    };
    let Some(sections) = header.get("sections").and_then(|s| s.as_array()) else {
        return false;
    };
    // The skippable section's place: after the lengths of the sections before it.
    let mut start = header_end;
    let mut span = None;
    for section in sections {
        let Some(len) = section.get("len").and_then(|l| l.as_u64()) else {
            return false;
        };
        let Some(end) = usize::try_from(len)
            .ok()
            .and_then(|l| l.checked_mul(8))
            .and_then(|b| b.checked_add(start))
        else {
            return false;
        };
        if section.get("name").and_then(|n| n.as_str()) == Some(SKIPPABLE_SECTION) {
            span = Some((start, end));
            break;
        }
        start = end;
    }
    let Some((start, end)) = span.filter(|&(_, end)| end <= body) else {
        return false;
    };
    let aside = crc32fast::hash(&bytes[start..end]);
    bytes[body..body + 4].copy_from_slice(&aside.to_le_bytes());
    let mut hasher = crc32fast::Hasher::new();
    hasher.update(&bytes[..start]);
    hasher.update(&bytes[end..body + 4]);
    bytes[body + 4..].copy_from_slice(&hasher.finalize().to_le_bytes());
    true
}

/// Reads a profile of `length` bytes from `source`. Every length the header declares is
/// checked against `length` before anything that large is allocated.
fn read_profile(
    mut source: impl Read + Seek,
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
    if length < (PREAMBLE + TRAILER) as u64 {
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
    // `length >= PREAMBLE + TRAILER` here; `end + TRAILER` could overflow for a header
    // length near the largest integer, `length - TRAILER` cannot.
    let header_end = header_len
        .checked_add(PREAMBLE as u64)
        .filter(|&end| end <= length - TRAILER as u64)
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
        .and_then(|v| v.checked_add(TRAILER as u64))
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
    let mut aside_hasher = crc32fast::Hasher::new();
    for (section, expected) in header.sections.iter().zip(SECTION_NAMES) {
        if section.name != expected {
            return Err(ProfileFault::Inconsistent(format!(
                "section \"{}\" where \"{expected}\" belongs",
                section.name
            ))
            .into());
        }
        let skippable = expected == SKIPPABLE_SECTION;
        if skippable && scope == ProfileScope::Scoring {
            // The file's length was checked against the header's: the section is there.
            let bytes = i64::try_from(section.len * 8).map_err(|_| ProfileFault::Truncated)?;
            source
                .seek(SeekFrom::Current(bytes))
                .map_err(ReadFailure::Io)?;
            sections.push(Vec::new());
            continue;
        }
        // Read straight into the values' storage, a piece at a time so that the checksum
        // reads each piece while it is still in cache; the file is little-endian.
        let hasher = if skippable {
            &mut aside_hasher
        } else {
            &mut hasher
        };
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
    }
    let mut graph = vec![0u8; header.index_graph_bytes];
    read_exact(&mut source, &mut graph)?;
    hasher.update(&graph);
    let mut trailer = [0u8; TRAILER];
    read_exact(&mut source, &mut trailer)?;
    hasher.update(&trailer[..4]);
    let stored_aside = u32::from_le_bytes(trailer[..4].try_into().expect("4 bytes"));
    let stored = u32::from_le_bytes(trailer[4..].try_into().expect("4 bytes"));
    if hasher.finalize() != stored
        || (scope == ProfileScope::Complete && aside_hasher.finalize() != stored_aside)
    {
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
                    &header.feature_names,
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

    /// `body` (preamble, header, sections, graph) with the two checksums of the layout
    /// appended by [`reseal`].
    fn sealed(mut body: Vec<u8>) -> Vec<u8> {
        body.extend_from_slice(&[0; TRAILER]);
        assert!(reseal(&mut body));
        body
    }

    /// The raw rows are checked when they are read and skipped unread when they are not
    /// needed: an edit there fails a complete load and not a scoring one, while an edit
    /// anywhere else fails both.
    #[test]
    fn the_raw_rows_are_checked_when_read() {
        let seed = &include_bytes!("../../fuzz/seeds/profile_bytes/standardize_lw_k3_as_is")[1..];
        let header_len = u64::from_le_bytes(seed[16..24].try_into().unwrap()) as usize;
        let header: Header =
            serde_json::from_slice(&seed[PREAMBLE..PREAMBLE + header_len]).unwrap();
        let before: usize = header
            .sections
            .iter()
            .take_while(|s| s.name != SKIPPABLE_SECTION)
            .map(|s| s.len * 8)
            .sum();
        let in_rows = PREAMBLE + header_len + before + 3;
        let in_index = PREAMBLE + header_len + 3;
        let load = |bytes: &[u8], scope| {
            let length = bytes.len() as u64;
            read_profile(std::io::Cursor::new(bytes), length, scope)
        };
        assert!(load(seed, ProfileScope::Scoring).is_ok());
        assert!(load(seed, ProfileScope::Complete).is_ok());
        let mut edited = seed.to_vec();
        edited[in_rows] ^= 0x08;
        assert!(load(&edited, ProfileScope::Scoring).is_ok());
        assert!(matches!(
            load(&edited, ProfileScope::Complete),
            Err(ReadFailure::Fault(ProfileFault::Checksum))
        ));
        let mut edited = seed.to_vec();
        edited[in_index] ^= 0x08;
        for scope in [ProfileScope::Scoring, ProfileScope::Complete] {
            assert!(matches!(
                load(&edited, scope),
                Err(ReadFailure::Fault(ProfileFault::Checksum))
            ));
        }
        // The helper above seals as the writer does.
        assert_eq!(sealed(seed[..seed.len() - TRAILER].to_vec()), seed);
    }

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
        bytes.extend_from_slice(&seed[header_end..seed.len() - TRAILER]);
        let bytes = sealed(bytes);
        assert!(matches!(
            Profile::from_bytes(&bytes),
            Err(ProfileFault::Inconsistent(_))
        ));
    }
}
