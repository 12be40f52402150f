//! Named streams of random numbers, all derived from the one seed an analysis states.
//!
//! Every random draw in an analysis comes from a stream named here, so that results depend on
//! the seed alone — not on the thread count, the shard, the order of the subjects in a file,
//! or the order in which work is done — and so that no two uses share a stream by accident.
//! Each stream's seed is the analysis seed mixed with a stream index by SplitMix64's finaliser
//! (Steele, Lea & Flood, OOPSLA 2014; citation recalled from memory), which maps nearby inputs
//! to unrelated outputs. Families of streams (one per subject) mix twice: first with the
//! family's index, then with the member's key.
//!
//! | stream | first mix | second mix |
//! |---|---|---|
//! | [`Seeds::subject`] (posterior or prior draws of one subject) | 0 | the subject's key |
//! | [`Seeds::plan`] (planner and next-level advisor) | 1 | — |
//! | [`Seeds::report_bands`] | 2 | — |
//! | [`Seeds::virtual_subject`] (a sweep's i-th subject) | 3 | i |
//! | [`Seeds::bootstrap_replicate`] | 4 | the replicate |
//! | [`Seeds::diagnostics`] (the NPDE simulations of one subject) | 5 | the subject's key |
//! | [`Seeds::vpc_replicate`] (a visual predictive check's i-th simulated study) | 6 | i |

use sha2::{Digest, Sha256};

/// The seed of an analysis, and the streams derived from it.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Seeds(pub u64);

/// First-mix indices: every stream and family has its own.
const SUBJECTS: u64 = 0;
const PLAN: u64 = 1;
const REPORT_BANDS: u64 = 2;
const VIRTUAL_SUBJECTS: u64 = 3;
const BOOTSTRAP: u64 = 4;
const DIAGNOSTICS: u64 = 5;
const VPC: u64 = 6;

impl Seeds {
    /// The draws of one subject's parameters — its posterior sampling when fitted, its prior
    /// draws when planned a priori — keyed by the subject's identifier (`None` for a single
    /// unnamed subject), not by its place in a file. So `fit` followed by `plan --fit` and a
    /// plan that fits on the spot draw the same posterior sample for the same subject and seed,
    /// whichever other subjects the files hold.
    pub fn subject(self, id: Option<&str>) -> u64 {
        mix(mix(self.0, SUBJECTS), subject_key(id))
    }

    /// The planner's and the next-level advisor's simulations.
    pub fn plan(self) -> u64 {
        mix(self.0, PLAN)
    }

    /// The prediction bands a report draws.
    pub fn report_bands(self) -> u64 {
        mix(self.0, REPORT_BANDS)
    }

    /// The `index`-th virtual subject of a sweep (counted across all shards).
    pub fn virtual_subject(self, index: u64) -> u64 {
        mix(mix(self.0, VIRTUAL_SUBJECTS), index)
    }

    /// The resampling of the `index`-th bootstrap replicate of a population estimation.
    pub fn bootstrap_replicate(self, index: u64) -> u64 {
        mix(mix(self.0, BOOTSTRAP), index)
    }

    /// The simulations of one subject's design behind its NPDE, keyed like [`Seeds::subject`]:
    /// the same for a subject whatever the thread count and the other subjects.
    pub fn diagnostics(self, id: Option<&str>) -> u64 {
        mix(mix(self.0, DIAGNOSTICS), subject_key(id))
    }

    /// The `index`-th simulated study of a visual predictive check: each replicate draws from
    /// its own stream, so the check is the same whatever the thread count.
    pub fn vpc_replicate(self, index: u64) -> u64 {
        mix(mix(self.0, VPC), index)
    }

    /// The uniform offset of a systematic resample of the `seed`'s draws.
    pub fn resample_offset(seed: u64) -> u64 {
        mix(seed, u64::MAX)
    }
}

/// A subject's key: the first eight bytes (little-endian) of the SHA-256 of its identifier's
/// UTF-8 bytes; the unnamed subject's is that of the empty identifier.
fn subject_key(id: Option<&str>) -> u64 {
    let digest = Sha256::digest(id.unwrap_or("").as_bytes());
    let mut first = [0u8; 8];
    first.copy_from_slice(&digest[..8]);
    u64::from_le_bytes(first)
}

/// SplitMix64's finaliser applied to `seed` advanced by `index + 1` golden-ratio steps.
fn mix(seed: u64, index: u64) -> u64 {
    let mut z = seed.wrapping_add(index.wrapping_add(1).wrapping_mul(0x9E37_79B9_7F4A_7C15));
    z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    z ^ (z >> 31)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn streams_are_the_documented_mixes() {
        // SplitMix64 with state 0: the first output is 0xE220A8397B1DCDAF (the published
        // reference sequence of the generator).
        assert_eq!(mix(0, 0), 0xE220_A839_7B1D_CDAF);
        // SHA-256("abc") begins ba 78 16 bf 8f 01 cf ea (FIPS 180-2, appendix B.1).
        assert_eq!(subject_key(Some("abc")), 0xEACF_018F_BF16_78BA);
    }

    #[test]
    fn no_two_streams_of_an_analysis_coincide() {
        // The streams one report uses: three subjects' draws, the planner, the bands and the
        // first virtual subjects of a sweep. Before the streams had families of their own, the
        // planner's was the second subject's and the bands' the third's.
        let s = Seeds(7);
        let mut all = vec![s.plan(), s.report_bands()];
        all.extend([None, Some("P01"), Some("P02"), Some("P03")].map(|id| s.subject(id)));
        all.extend((0..1000).map(|i| s.virtual_subject(i)));
        let n = all.len();
        all.sort_unstable();
        all.dedup();
        assert_eq!(all.len(), n);
    }
}
