//! Content digests: SHA-256 in lower-case hex, the one fingerprint of input files, sweep
//! setups, per-subject rows and report inputs.

use sha2::{Digest, Sha256};
use std::io::{Read, Write};

/// SHA-256 of `bytes`, in lower-case hex.
pub fn sha256_hex(bytes: &[u8]) -> String {
    hex(&Sha256::digest(bytes))
}

fn hex(bytes: &[u8]) -> String {
    bytes.iter().map(|b| format!("{b:02x}")).collect()
}

/// A reader or writer that digests every byte passing through it, so a file is fingerprinted
/// while it is written or read, without a second pass over it.
pub struct Digesting<T> {
    inner: T,
    hasher: Sha256,
}

impl<T> Digesting<T> {
    /// Digest what passes through `inner`.
    pub fn new(inner: T) -> Digesting<T> {
        Digesting { inner, hasher: Sha256::new() }
    }

    /// The wrapped reader or writer.
    pub fn inner_mut(&mut self) -> &mut T {
        &mut self.inner
    }

    /// SHA-256 of the bytes that passed, in lower-case hex.
    pub fn finish(self) -> String {
        hex(&self.hasher.finalize())
    }
}

impl<W: Write> Write for Digesting<W> {
    fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
        let n = self.inner.write(buf)?;
        self.hasher.update(&buf[..n]);
        Ok(n)
    }

    fn flush(&mut self) -> std::io::Result<()> {
        self.inner.flush()
    }
}

impl<R: Read> Read for Digesting<R> {
    fn read(&mut self, buf: &mut [u8]) -> std::io::Result<usize> {
        let n = self.inner.read(buf)?;
        self.hasher.update(&buf[..n]);
        Ok(n)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sha256_of_a_published_test_vector() {
        // FIPS 180-2, appendix B.1: SHA-256("abc").
        assert_eq!(sha256_hex(b"abc"), "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad");
    }

    #[test]
    fn digesting_a_stream_gives_the_digest_of_its_bytes() {
        // FIPS 180-2, appendix B.2: the 56-byte message, written and read in pieces.
        let message = b"abcdbcdecdefdefgefghfghighijhijkijkljklmklmnlmnomnopnopq";
        let expected = "248d6a61d20638b8e5c026930c3e6039a33ce45964ff2167f6ecedd419db06c1";
        let mut w = Digesting::new(Vec::new());
        for piece in message.chunks(5) {
            w.write_all(piece).unwrap();
        }
        assert_eq!(w.inner_mut().as_slice(), message);
        assert_eq!(w.finish(), expected);
        let mut r = Digesting::new(&message[..]);
        let mut back = Vec::new();
        r.read_to_end(&mut back).unwrap();
        assert_eq!(r.finish(), expected);
    }
}
