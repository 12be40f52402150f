//! Content digests: SHA-256 in lower-case hex, the one fingerprint of input files, sweep
//! setups and report inputs.

use sha2::{Digest, Sha256};

/// SHA-256 of `bytes`, in lower-case hex.
pub fn sha256_hex(bytes: &[u8]) -> String {
    Sha256::digest(bytes).iter().map(|b| format!("{b:02x}")).collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sha256_of_a_published_test_vector() {
        // FIPS 180-2, appendix B.1: SHA-256("abc").
        assert_eq!(sha256_hex(b"abc"), "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad");
    }
}
