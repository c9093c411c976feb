//! The check both matrix targets make on a second read in tiny blocks.

use kilter::corpus::FeatureMatrix;

/// The same matrix bit for bit (names and values), or the same error message, whatever
/// the block size the second read used.
pub fn assert_same_outcome(
    everyday: &kilter::Result<FeatureMatrix>,
    tiny: &kilter::Result<FeatureMatrix>,
    block: usize,
) {
    match (everyday, tiny) {
        (Ok(a), Ok(b)) => {
            assert_eq!(a.names, b.names, "names read in {block}-byte blocks");
            assert_eq!(a.values.dim(), b.values.dim(), "shape read in {block}-byte blocks");
            for (x, y) in a.values.iter().zip(b.values.iter()) {
                assert_eq!(x.to_bits(), y.to_bits(), "values read in {block}-byte blocks");
            }
        }
        (Err(a), Err(b)) => assert_eq!(
            a.to_string(),
            b.to_string(),
            "error read in {block}-byte blocks"
        ),
        (a, b) => panic!(
            "{block}-byte blocks change the outcome: {:?} vs {:?}",
            a.as_ref().err().map(ToString::to_string),
            b.as_ref().err().map(ToString::to_string)
        ),
    }
}
