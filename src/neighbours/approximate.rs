//! Approximate k-nearest-neighbour search with a hierarchical navigable small-world graph
//! (Malkov & Yashunin, "Efficient and robust approximate nearest neighbor search using
//! Hierarchical Navigable Small World graphs", IEEE TPAMI 2020), for corpora too large for
//! the exact indexes.
//!
//! The graph comes from the `instant-distance` crate, over the rows centred at their mean,
//! scaled by a power of two and rounded to single precision. A query takes the `ef_search` candidates the graph search returns,
//! computes their exact double-precision distances and keeps the `k` nearest (ties by the
//! lower index), so the distances returned are exact even where a true neighbour was
//! missed. The build is deterministic: the crate draws every node's layer from the seed,
//! and its insertions run on a private one-thread pool, because concurrent insertion makes
//! the graph depend on the interleaving of threads. Queries run in parallel; each one's
//! answer depends on the graph and the query alone.
//!
//! [`ApproximateIndex::graph_bytes`] stores the built graph (a checked header, then the
//! crate's own serde form in `postcard`); [`ApproximateIndex::from_graph_bytes`] restores it
//! after checking the header, the checksum, the graph's invariants (every link inside its
//! layer, the row numbering a permutation) and that its points are the given rows, so that
//! damaged bytes are an error and never reach code that could index out of bounds.

use instant_distance::{Builder, HnswMap, Point, Search};
use ndarray::{Array1, Array2, ArrayView1, ArrayView2, Axis};
use serde::{Deserialize, Serialize};

use super::{
    check_request, exact_squared_distance, exhaustive, nearest_first, refuse_non_finite,
    search_in_blocks, Exclusion, NeighbourIndex, Neighbours,
};
use crate::error::{Error, GraphFault, IndexFault, Result};

/// Links per node on the upper layers (twice as many on the bottom layer): `instant-distance`
/// fixes this parameter (the paper's M) at 32, so it is not a setting.
pub const GRAPH_CONNECTIONS: usize = 32;
/// The name errors give this index.
const NAME: &str = "approximate";
/// The first bytes of stored graph bytes.
const SIGNATURE: &[u8; 8] = b"KLTRHNSW";
/// Version of the stored graph layout; bump it when the layout or the crate's changes.
const GRAPH_VERSION: u32 = 1;
/// Signature, version, six u64 fields, checksum.
const HEADER_LEN: usize = 8 + 4 + 6 * 8 + 4;

/// The graph's construction and search widths and its seed.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub struct ApproximateSettings {
    ef_construction: usize,
    ef_search: usize,
    seed: u64,
}

impl ApproximateSettings {
    /// Candidates kept while linking a new node (the crate's default).
    pub const DEFAULT_EF_CONSTRUCTION: usize = 100;
    /// Candidates a query's graph search returns (the crate's default). It bounds `k`.
    pub const DEFAULT_EF_SEARCH: usize = 100;
    /// The largest width accepted for either: beyond it a search is no longer cheap.
    pub const MAX_EF: usize = 4096;

    /// Checked settings: both widths between 1 and [`Self::MAX_EF`].
    pub fn new(ef_construction: usize, ef_search: usize, seed: u64) -> Result<Self> {
        for (flag, value) in [
            ("ef_construction", ef_construction),
            ("ef_search", ef_search),
        ] {
            if value == 0 || value > Self::MAX_EF {
                return Err(Error::InvalidSetting {
                    flag,
                    value: value.to_string(),
                    expected: format!("between 1 and {}", Self::MAX_EF),
                });
            }
        }
        Ok(ApproximateSettings {
            ef_construction,
            ef_search,
            seed,
        })
    }

    pub fn ef_construction(&self) -> usize {
        self.ef_construction
    }

    pub fn ef_search(&self) -> usize {
        self.ef_search
    }

    pub fn seed(&self) -> u64 {
        self.seed
    }
}

impl Default for ApproximateSettings {
    fn default() -> Self {
        ApproximateSettings {
            ef_construction: Self::DEFAULT_EF_CONSTRUCTION,
            ef_search: Self::DEFAULT_EF_SEARCH,
            seed: 0,
        }
    }
}

/// A centred row in single precision, as the graph sees it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
struct GraphPoint(Vec<f32>);

impl Point for GraphPoint {
    /// Squared Euclidean distance: it orders candidates as the distance does.
    fn distance(&self, other: &Self) -> f32 {
        self.0
            .iter()
            .zip(&other.0)
            .map(|(a, b)| (a - b) * (a - b))
            .sum()
    }
}

/// The graph with each node's row number as its value.
type Graph = HnswMap<GraphPoint, u32>;

/// The serde shape of [`Graph`] in `instant-distance` 0.6.1 (pinned in Cargo.toml), with its
/// links as plain numbers so that they can be checked before the crate sees them. A unit
/// test checks that re-encoding this mirror gives the crate's bytes back exactly.
#[derive(Serialize, Deserialize)]
struct GraphMirror {
    hnsw: HnswMirror,
    values: Vec<u32>,
}

#[derive(Serialize, Deserialize)]
struct HnswMirror {
    ef_search: usize,
    points: Vec<GraphPoint>,
    /// Bottom layer: 2 x M links per node, `u32::MAX` for an empty slot.
    zero: Vec<[[u32; GRAPH_CONNECTIONS]; 2]>,
    /// Upper layers, lowest first: M links per node.
    layers: Vec<Vec<[u32; GRAPH_CONNECTIONS]>>,
}

/// The crate's marker for an empty link slot.
const NO_LINK: u32 = u32::MAX;

/// How rows become graph points: centred at the rows' mean and scaled by a power of two
/// (exact) that brings the largest centred magnitude near 1, so that single-precision
/// squares neither overflow (data near 1e20) nor underflow (data near 1e-25).
#[derive(Debug, Clone)]
struct Placement {
    center: Array1<f64>,
    scale: f64,
}

impl Placement {
    fn of(rows: ArrayView2<'_, f64>) -> Self {
        let center = rows
            .mean_axis(Axis(0))
            .unwrap_or_else(|| Array1::zeros(rows.ncols()));
        let largest = rows.outer_iter().fold(0.0_f64, |m, row| {
            row.iter()
                .zip(center.iter())
                .fold(m, |m, (v, c)| m.max((v - c).abs()))
        });
        let scale = if largest > 0.0 && largest.is_finite() {
            (-largest.log2().ceil()).exp2()
        } else {
            1.0
        };
        Placement { center, scale }
    }

    fn point(&self, row: ArrayView1<'_, f64>) -> GraphPoint {
        GraphPoint(
            row.iter()
                .zip(self.center.iter())
                .map(|(v, c)| ((v - c) * self.scale) as f32)
                .collect(),
        )
    }

    fn points(&self, rows: ArrayView2<'_, f64>) -> Vec<GraphPoint> {
        rows.outer_iter().map(|row| self.point(row)).collect()
    }
}

fn graph_fault(fault: GraphFault) -> Error {
    Error::NeighbourIndex {
        index: NAME,
        fault: IndexFault::Graph(fault),
    }
}

impl GraphMirror {
    /// The invariants the crate's search relies on: the bottom layer links rows of the
    /// corpus, each upper layer is a prefix of the one below and links only inside itself
    /// (the search enters every layer at node 0), the values number the rows once each, and
    /// the points are the given rows, centred and rounded as a build would make them.
    fn check(&self, points: &[GraphPoint]) -> std::result::Result<(), GraphFault> {
        let n = points.len();
        let hnsw = &self.hnsw;
        if hnsw.points.len() != n || hnsw.zero.len() != n || self.values.len() != n {
            return Err(GraphFault::Structure(
                "the graph does not have one node per row",
            ));
        }
        let within = |links: &[u32], len: usize| {
            links.iter().all(|&id| id == NO_LINK || (id as usize) < len)
        };
        if !hnsw.zero.iter().all(|node| within(node.as_flattened(), n)) {
            return Err(GraphFault::Structure(
                "a bottom-layer link points past the rows",
            ));
        }
        let mut below = n;
        for layer in &hnsw.layers {
            if layer.is_empty() || layer.len() > below {
                return Err(GraphFault::Structure(
                    "an upper layer is empty or larger than the layer below",
                ));
            }
            if !layer.iter().all(|node| within(node, layer.len())) {
                return Err(GraphFault::Structure(
                    "an upper-layer link points past its layer",
                ));
            }
            below = layer.len();
        }
        let mut seen = vec![false; n];
        for &value in &self.values {
            match seen.get_mut(value as usize) {
                Some(slot) if !*slot => *slot = true,
                _ => {
                    return Err(GraphFault::Structure(
                        "the graph's row numbers are not a permutation of the rows",
                    ))
                }
            }
        }
        let same_points = self
            .values
            .iter()
            .zip(&hnsw.points)
            .all(|(&row, point)| point.0 == points[row as usize].0);
        if !same_points {
            return Err(GraphFault::Points);
        }
        Ok(())
    }
}

/// Approximate search through a navigable small-world graph over rows held in memory.
pub struct ApproximateIndex {
    rows: Array2<f64>,
    placement: Placement,
    settings: ApproximateSettings,
    graph: Graph,
}

impl std::fmt::Debug for ApproximateIndex {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("ApproximateIndex")
            .field("rows", &self.rows.nrows())
            .field("dim", &self.rows.ncols())
            .field("settings", &self.settings)
            .finish()
    }
}

/// Rows in standard layout with their placement, after the checks every constructor makes.
fn prepared(rows: Array2<f64>) -> Result<(Array2<f64>, Placement)> {
    let rows = rows.as_standard_layout().into_owned();
    // The crate numbers nodes in 32 bits and keeps u32::MAX as its empty-slot marker.
    if rows.nrows() >= NO_LINK as usize {
        return Err(Error::NeighbourIndex {
            index: NAME,
            fault: IndexFault::TooManyRows {
                rows: rows.nrows(),
                max: NO_LINK as usize - 1,
            },
        });
    }
    refuse_non_finite(NAME, "indexed rows", rows.view())?;
    let placement = Placement::of(rows.view());
    Ok((rows, placement))
}

impl ApproximateIndex {
    /// Builds the graph over the rows (copied into standard layout). Single-threaded, so
    /// that the same rows and settings give the same graph on any machine.
    pub fn new(rows: Array2<f64>, settings: ApproximateSettings) -> Result<Self> {
        let (rows, placement) = prepared(rows)?;
        let points = placement.points(rows.view());
        let values: Vec<u32> = (0..rows.nrows() as u32).collect();
        let pool = rayon::ThreadPoolBuilder::new()
            .num_threads(1)
            .build()
            .map_err(|e| Error::NeighbourIndex {
                index: NAME,
                fault: IndexFault::WorkerPool(e.to_string()),
            })?;
        let builder = Builder::default()
            .ef_construction(settings.ef_construction)
            .ef_search(settings.ef_search)
            .seed(settings.seed);
        let graph = pool.install(|| builder.build(points, values));
        Ok(ApproximateIndex {
            rows,
            placement,
            settings,
            graph,
        })
    }

    /// The settings the graph was built (or restored) with.
    pub fn settings(&self) -> ApproximateSettings {
        self.settings
    }

    /// The built graph as bytes: a header (signature, version, rows, dimension, settings,
    /// payload length, CRC-32 of the payload) and the graph's `postcard` encoding. The same
    /// rows and settings give the same bytes.
    pub fn graph_bytes(&self) -> Vec<u8> {
        let payload = postcard::to_allocvec(&self.graph)
            .expect("encoding plain numbers into memory does not fail");
        frame(
            self.rows.nrows(),
            self.rows.ncols(),
            self.settings,
            &payload,
        )
    }

    /// Restores an index from the rows it was built on and [`Self::graph_bytes`], without
    /// rebuilding. `settings` must carry the construction width and seed the graph was built
    /// with; its search width may differ and applies from now on. Damaged or mismatched
    /// bytes are refused with [`GraphFault`].
    pub fn from_graph_bytes(
        rows: Array2<f64>,
        bytes: &[u8],
        settings: ApproximateSettings,
    ) -> Result<Self> {
        let (rows, placement) = prepared(rows)?;
        let header = Header::read(bytes).map_err(graph_fault)?;
        if header.rows != rows.nrows() as u64 || header.dim != rows.ncols() as u64 {
            return Err(graph_fault(GraphFault::Shape {
                stored_rows: header.rows,
                stored_dim: header.dim,
                rows: rows.nrows(),
                dim: rows.ncols(),
            }));
        }
        if header.ef_construction != settings.ef_construction as u64 || header.seed != settings.seed
        {
            return Err(graph_fault(GraphFault::Settings));
        }
        let payload = &bytes[HEADER_LEN..];
        let mut mirror: GraphMirror = postcard::from_bytes(payload)
            .map_err(|e| graph_fault(GraphFault::Decode(e.to_string())))?;
        mirror
            .check(&placement.points(rows.view()))
            .map_err(graph_fault)?;
        mirror.hnsw.ef_search = settings.ef_search;
        let checked = postcard::to_allocvec(&mirror)
            .expect("encoding plain numbers into memory does not fail");
        let graph: Graph = postcard::from_bytes(&checked)
            .map_err(|e| graph_fault(GraphFault::Decode(e.to_string())))?;
        Ok(ApproximateIndex {
            rows,
            placement,
            settings,
            graph,
        })
    }

    /// The `k` nearest rows the graph finds for one query, as `(squared distance, index)`.
    fn search_one(
        &self,
        search: &mut Search,
        query: ArrayView1<'_, f64>,
        own: usize,
        k: usize,
        exclusion: Exclusion,
    ) -> Vec<(f64, usize)> {
        let point = self.placement.point(query);
        let mut found: Vec<(f64, usize)> = self
            .graph
            .search(&point, search)
            .map(|item| *item.value as usize)
            .filter(|&row| !(exclusion == Exclusion::SameIndex && row == own))
            .map(|row| (exact_squared_distance(query, self.rows.row(row)), row))
            .collect();
        if found.len() < k {
            // The graph reached fewer rows than asked (a tiny or disconnected graph):
            // answer this query exactly rather than short.
            return exhaustive(self.rows.view(), query, own, k, exclusion);
        }
        found.sort_by(nearest_first);
        found.truncate(k);
        found
    }
}

/// The fixed-size header in front of the encoded graph.
struct Header {
    rows: u64,
    dim: u64,
    ef_construction: u64,
    seed: u64,
}

fn frame(rows: usize, dim: usize, settings: ApproximateSettings, payload: &[u8]) -> Vec<u8> {
    let mut bytes = Vec::with_capacity(HEADER_LEN + payload.len());
    bytes.extend_from_slice(SIGNATURE);
    bytes.extend_from_slice(&GRAPH_VERSION.to_le_bytes());
    for field in [
        rows as u64,
        dim as u64,
        settings.ef_construction as u64,
        settings.ef_search as u64,
        settings.seed,
        payload.len() as u64,
    ] {
        bytes.extend_from_slice(&field.to_le_bytes());
    }
    bytes.extend_from_slice(&crc32fast::hash(payload).to_le_bytes());
    bytes.extend_from_slice(payload);
    bytes
}

impl Header {
    fn read(bytes: &[u8]) -> std::result::Result<Header, GraphFault> {
        if bytes.len() < SIGNATURE.len() || &bytes[..SIGNATURE.len()] != SIGNATURE {
            return Err(GraphFault::NotAGraph);
        }
        if bytes.len() < HEADER_LEN {
            return Err(GraphFault::Length);
        }
        let u32_at = |at: usize| u32::from_le_bytes(bytes[at..at + 4].try_into().expect("4"));
        let u64_at = |at: usize| u64::from_le_bytes(bytes[at..at + 8].try_into().expect("8"));
        let version = u32_at(8);
        if version != GRAPH_VERSION {
            return Err(GraphFault::Version {
                found: version,
                supported: GRAPH_VERSION,
            });
        }
        let payload_len = u64_at(52);
        if payload_len != (bytes.len() - HEADER_LEN) as u64 {
            return Err(GraphFault::Length);
        }
        if u32_at(60) != crc32fast::hash(&bytes[HEADER_LEN..]) {
            return Err(GraphFault::Checksum);
        }
        Ok(Header {
            rows: u64_at(12),
            dim: u64_at(20),
            ef_construction: u64_at(28),
            seed: u64_at(44),
        })
    }
}

impl NeighbourIndex for ApproximateIndex {
    fn rows(&self) -> ArrayView2<'_, f64> {
        self.rows.view()
    }

    /// Besides the common refusals, `k` (plus one under self-exclusion) may not exceed the
    /// search width `ef_search`: one graph search returns no more candidates than that.
    fn k_nearest(
        &self,
        queries: ArrayView2<'_, f64>,
        k: usize,
        exclusion: Exclusion,
    ) -> Result<Neighbours> {
        check_request(self.len(), self.dim(), queries, k, exclusion)?;
        let wanted = k + usize::from(exclusion == Exclusion::SameIndex);
        if wanted > self.settings.ef_search {
            return Err(Error::NeighbourIndex {
                index: NAME,
                fault: IndexFault::BeyondSearchWidth {
                    wanted,
                    ef_search: self.settings.ef_search,
                },
            });
        }
        refuse_non_finite(NAME, "queries", queries)?;
        Ok(search_in_blocks(queries, k, |block, first| {
            let mut search = Search::default();
            block
                .outer_iter()
                .enumerate()
                .map(|(qi, q)| self.search_one(&mut search, q, first + qi, k, exclusion))
                .collect()
        }))
    }
}

#[cfg(test)]
mod tests {
    use super::super::{conformance, recall, BruteForceIndex};
    use super::*;

    fn build(rows: Array2<f64>) -> ApproximateIndex {
        ApproximateIndex::new(rows, ApproximateSettings::default()).unwrap()
    }

    fn in_pool<T: Send>(threads: usize, work: impl FnOnce() -> T + Send) -> T {
        rayon::ThreadPoolBuilder::new()
            .num_threads(threads)
            .build()
            .unwrap()
            .install(work)
    }

    conformance::shared_tests!(build);

    #[test]
    fn settings_out_of_range_are_refused() {
        assert!(ApproximateSettings::new(0, 10, 1).is_err());
        assert!(ApproximateSettings::new(10, 0, 1).is_err());
        assert!(ApproximateSettings::new(10, ApproximateSettings::MAX_EF + 1, 1).is_err());
        let ok = ApproximateSettings::new(10, 20, 3).unwrap();
        assert_eq!(
            (ok.ef_construction(), ok.ef_search(), ok.seed()),
            (10, 20, 3)
        );
    }

    /// One graph search returns at most ef_search candidates: with ef_search = 4, k = 4 is
    /// possible for new points but not in-sample (it needs a fifth for the query itself).
    #[test]
    fn k_beyond_the_search_width_is_refused() {
        let rows = conformance::gaussian_rows(50, 3, 5);
        let index =
            ApproximateIndex::new(rows.clone(), ApproximateSettings::new(16, 4, 0).unwrap())
                .unwrap();
        assert!(index.k_nearest(rows.view(), 4, Exclusion::None).is_ok());
        let err = index
            .k_nearest(rows.view(), 4, Exclusion::SameIndex)
            .unwrap_err();
        assert!(matches!(
            err,
            Error::NeighbourIndex {
                fault: IndexFault::BeyondSearchWidth {
                    wanted: 5,
                    ef_search: 4
                },
                ..
            }
        ));
    }

    /// Recall at k = 10 against the exact index on 20,000 x 16 standard Gaussian rows with
    /// the default settings, 1,000 new queries and every row in-sample (itself excluded). The bound 0.95 is
    /// the brief's; HNSW at M = 32 and ef = 100 usually exceeds 0.99 on such data (from
    /// memory of the paper's figures, not a computed reference). The distances returned are
    /// the exact distances of the rows returned, ascending.
    #[test]
    fn recall_against_the_exact_index_at_default_settings() {
        let rows = conformance::gaussian_rows(20_000, 16, 11);
        let queries = conformance::gaussian_rows(1_000, 16, 12);
        let index = build(rows.clone());
        let exact = BruteForceIndex::new(rows.clone());
        let k = 10;

        let got = index.k_nearest(queries.view(), k, Exclusion::None).unwrap();
        let want = exact.k_nearest(queries.view(), k, Exclusion::None).unwrap();
        let new_points = recall(&want, &got);

        let sample = rows.slice(ndarray::s![..1_000, ..]);
        let all_in = index
            .k_nearest(rows.view(), k, Exclusion::SameIndex)
            .unwrap();
        let exact_in = exact
            .k_nearest(rows.view(), k, Exclusion::SameIndex)
            .unwrap();
        let in_sample = recall(&exact_in, &all_in);
        eprintln!("recall at 10: new points {new_points:.4}, in-sample {in_sample:.4}");
        assert!(new_points >= 0.95, "recall {new_points}");
        assert!(in_sample >= 0.95, "recall {in_sample}");

        for (qi, q) in sample.outer_iter().enumerate() {
            assert!(all_in.indices.row(qi).iter().all(|&i| i != qi));
            let d = all_in.distances.row(qi);
            for (j, &i) in all_in.indices.row(qi).iter().enumerate() {
                assert_eq!(d[j], exact_squared_distance(q, rows.row(i)).sqrt());
            }
            assert!(d.windows(2).into_iter().all(|w| w[0] <= w[1]));
        }
    }

    /// Magnitudes whose squares overflow single precision (1e20) or underflow it (1e-25):
    /// the power-of-two scaling keeps the graph navigable. With 2,000 x 4 rows and
    /// ef_search = 100 the search sees most of the close rows, so recall stays above 0.95
    /// (the same bound as at 20,000 x 16).
    #[test]
    fn extreme_magnitudes_still_navigate() {
        for magnitude in [1e20, 1e-25] {
            let rows = conformance::gaussian_rows(2_000, 4, 41).mapv(|v| v * magnitude);
            let queries = conformance::gaussian_rows(200, 4, 42).mapv(|v| v * magnitude);
            let index = build(rows.clone());
            let got = index.k_nearest(queries.view(), 5, Exclusion::None).unwrap();
            let want = BruteForceIndex::new(rows)
                .k_nearest(queries.view(), 5, Exclusion::None)
                .unwrap();
            let found = recall(&want, &got);
            assert!(found >= 0.95, "magnitude {magnitude}: recall {found}");
        }
    }

    /// Same seed, same graph to the byte and the same answers, whether the caller runs on
    /// one thread or two; another seed gives another graph (so the seed is really used).
    #[test]
    fn the_build_is_deterministic_for_a_seed_whatever_the_threads() {
        let rows = conformance::awkward_rows(3_000, 8, 21);
        let queries = conformance::gaussian_rows(300, 8, 22);
        let settings = ApproximateSettings::new(64, 32, 9).unwrap();
        let run = |threads| {
            in_pool(threads, || {
                let index = ApproximateIndex::new(rows.clone(), settings).unwrap();
                let nn = index.k_nearest(queries.view(), 5, Exclusion::None).unwrap();
                let own = index
                    .k_nearest(rows.view(), 5, Exclusion::SameIndex)
                    .unwrap();
                (index.graph_bytes(), nn, own)
            })
        };
        let one = run(1);
        let two = run(2);
        assert_eq!(one.0, two.0);
        assert_eq!(one.1, two.1);
        assert_eq!(one.2, two.2);
        let again = run(2);
        assert_eq!(one.0, again.0);

        let other = ApproximateSettings::new(64, 32, 10).unwrap();
        let reseeded = ApproximateIndex::new(rows.clone(), other).unwrap();
        assert_ne!(one.0, reseeded.graph_bytes());
    }

    fn small_index() -> (Array2<f64>, ApproximateSettings, ApproximateIndex) {
        let rows = conformance::awkward_rows(500, 4, 31);
        let settings = ApproximateSettings::new(40, 24, 3).unwrap();
        let index = ApproximateIndex::new(rows.clone(), settings).unwrap();
        (rows, settings, index)
    }

    fn restore(rows: &Array2<f64>, bytes: &[u8], settings: ApproximateSettings) -> GraphFault {
        match ApproximateIndex::from_graph_bytes(rows.clone(), bytes, settings) {
            Err(Error::NeighbourIndex {
                fault: IndexFault::Graph(fault),
                ..
            }) => fault,
            other => panic!("expected a graph fault, got {other:?}"),
        }
    }

    #[test]
    fn a_stored_graph_restores_to_the_same_index() {
        let (rows, settings, index) = small_index();
        let bytes = index.graph_bytes();
        let restored = ApproximateIndex::from_graph_bytes(rows.clone(), &bytes, settings).unwrap();
        assert_eq!(restored.graph_bytes(), bytes);
        let queries = conformance::gaussian_rows(100, 4, 32);
        for exclusion in [Exclusion::None, Exclusion::SameIndex] {
            let q = if exclusion == Exclusion::None {
                queries.view()
            } else {
                rows.view()
            };
            assert_eq!(
                restored.k_nearest(q, 6, exclusion).unwrap(),
                index.k_nearest(q, 6, exclusion).unwrap()
            );
        }
        // A wider search width applies on restoring; the stored graph is the same.
        let wider = ApproximateSettings::new(40, 48, 3).unwrap();
        let widened = ApproximateIndex::from_graph_bytes(rows.clone(), &bytes, wider).unwrap();
        assert_eq!(widened.settings().ef_search(), 48);
        assert!(widened
            .k_nearest(rows.view(), 40, Exclusion::SameIndex)
            .is_ok());
    }

    /// The mirror of the crate's serde shape re-encodes to the crate's bytes exactly, so
    /// the checks run on what the crate will read.
    #[test]
    fn the_mirror_matches_the_crates_encoding() {
        let (_, _, index) = small_index();
        let payload = postcard::to_allocvec(&index.graph).unwrap();
        let mirror: GraphMirror = postcard::from_bytes(&payload).unwrap();
        assert!(!mirror.hnsw.layers.is_empty(), "500 rows make upper layers");
        assert_eq!(postcard::to_allocvec(&mirror).unwrap(), payload);
    }

    #[test]
    fn damaged_bytes_are_refused() {
        let (rows, settings, index) = small_index();
        let bytes = index.graph_bytes();

        assert_eq!(
            restore(&rows, b"not a graph", settings),
            GraphFault::NotAGraph
        );
        for cut in [
            9,
            HEADER_LEN - 1,
            HEADER_LEN,
            bytes.len() / 2,
            bytes.len() - 1,
        ] {
            assert_eq!(restore(&rows, &bytes[..cut], settings), GraphFault::Length);
        }
        let mut longer = bytes.clone();
        longer.push(0);
        assert_eq!(restore(&rows, &longer, settings), GraphFault::Length);

        let mut flipped = bytes.clone();
        let at = HEADER_LEN + (bytes.len() - HEADER_LEN) / 3;
        flipped[at] ^= 0x10;
        assert_eq!(restore(&rows, &flipped, settings), GraphFault::Checksum);

        let mut version = bytes.clone();
        version[8] = 9;
        assert!(matches!(
            restore(&rows, &version, settings),
            GraphFault::Version { found: 9, .. }
        ));

        let fewer = rows.slice(ndarray::s![..499, ..]).to_owned();
        assert!(matches!(
            restore(&fewer, &bytes, settings),
            GraphFault::Shape {
                stored_rows: 500,
                ..
            }
        ));
        let mut moved = rows.clone();
        moved[[123, 2]] += 0.5;
        assert_eq!(restore(&moved, &bytes, settings), GraphFault::Points);
        let reseeded = ApproximateSettings::new(40, 24, 4).unwrap();
        assert_eq!(restore(&rows, &bytes, reseeded), GraphFault::Settings);
    }

    /// Bytes with a valid header and checksum whose graph breaks an invariant (a crafted or
    /// mis-written file) are refused before the crate, which would index out of bounds.
    #[test]
    fn graphs_breaking_an_invariant_are_refused() {
        let (rows, settings, index) = small_index();
        let payload = postcard::to_allocvec(&index.graph).unwrap();
        let tamper = |change: &dyn Fn(&mut GraphMirror)| {
            let mut mirror: GraphMirror = postcard::from_bytes(&payload).unwrap();
            change(&mut mirror);
            let payload = postcard::to_allocvec(&mirror).unwrap();
            restore(&rows, &frame(500, 4, settings, &payload), settings)
        };
        assert!(matches!(
            tamper(&|m| m.hnsw.zero[7][0][0] = 500),
            GraphFault::Structure(_)
        ));
        assert!(matches!(
            tamper(&|m| {
                let len = m.hnsw.layers[0].len() as u32;
                m.hnsw.layers[0][0][0] = len;
            }),
            GraphFault::Structure(_)
        ));
        assert!(matches!(
            tamper(&|m| m.values[3] = m.values[4]),
            GraphFault::Structure(_)
        ));
        assert!(matches!(
            tamper(&|m| {
                m.hnsw.zero.pop();
            }),
            GraphFault::Structure(_)
        ));
        assert!(matches!(
            tamper(&|m| m.hnsw.layers.push(Vec::new())),
            GraphFault::Structure(_)
        ));
        assert!(matches!(
            restore(
                &rows,
                &frame(500, 4, settings, &payload[..payload.len() - 3]),
                settings
            ),
            GraphFault::Decode(_)
        ));
    }
}
