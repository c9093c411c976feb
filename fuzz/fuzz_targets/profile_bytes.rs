//! Fuzz target: `Profile::from_bytes` on arbitrary bytes.
//!
//! The first byte picks the mode. Even: the rest is the file as it is, so the signature,
//! the lengths and the checksums are under test. Odd: the two checksums at the end of the
//! rest are recomputed (`kilter::profile::reseal`, where the header can still be followed),
//! so that a mutation of the header or of a section still passes them and reaches the
//! parsing and validation behind it.
//! The seed corpus (`fuzz/seeds/profile_bytes/`) holds a real profile in both modes.
//!
//! Loading must never panic. A profile it accepts must be well formed (consistent
//! dimensions, k within the indexed rows) and usable: scoring its own feature location
//! gives non-negative distances, p-values in (0, 1] and p_combined as SPEC defines it, and
//! writing it out and reading it back gives the same bytes again.

#![no_main]

use kilter::neighbours::NeighbourIndex;
use kilter::profile::Profile;
use kilter::stats::combine_p_values;
use libfuzzer_sys::fuzz_target;
use ndarray::Array2;

fuzz_target!(|data: &[u8]| {
    let Some((&mode, rest)) = data.split_first() else {
        return;
    };
    let mut bytes = rest.to_vec();
    if mode & 1 == 1 {
        kilter::profile::reseal(&mut bytes);
    }
    let Ok(profile) = Profile::from_bytes(&bytes) else {
        return;
    };

    let p = profile.feature_names().len();
    assert!(p >= 1);
    let k = profile.settings().k;
    assert!(k >= 1 && k <= profile.fitted_rows());
    assert_eq!(
        profile.index().rows().dim(),
        (profile.fitted_rows(), profile.embedded_dim())
    );
    assert_eq!(
        profile
            .feature_distribution()
            .expect("a complete profile")
            .location()
            .len(),
        p
    );

    let location = profile
        .feature_distribution()
        .expect("a complete profile")
        .location()
        .to_vec();
    let row = Array2::from_shape_vec((1, p), location).expect("one row of p features");
    if let Ok(records) = profile.score(row.view(), 0, 0.01) {
        assert_eq!(records.len(), 1);
        let r = &records[0];
        assert!(r.mahalanobis_d2 >= 0.0, "d2 = {}", r.mahalanobis_d2);
        assert!(r.knn_kth >= 0.0 && r.knn_mean >= 0.0, "{r:?}");
        for p_value in [r.p_mahalanobis, r.p_knn, r.p_combined] {
            assert!(p_value > 0.0 && p_value <= 1.0, "{r:?}");
        }
        assert_eq!(r.p_combined, combine_p_values(r.p_mahalanobis, r.p_knn));
    }

    let written = profile.to_bytes();
    let reread = Profile::from_bytes(&written).expect("a written profile reads again");
    assert_eq!(
        reread.to_bytes(),
        written,
        "the profile survives the round trip"
    );
});
