//! Provenance: hashes of inputs and outputs, and the lock record.
//!
//! Every input is hashed with SHA-256 over its raw bytes, so `sha256sum`
//! prints the same value. The lock record seals a plan: `cairn lock` appends a
//! record holding the plan's hash and text, who locked it, when and why, the
//! tool version, the hash of the blinded subjects file if it exists, and the
//! hash of the previous record, so that amendments form a hash chain in which
//! an edited or removed record is detected. `run` compares the plan's bytes
//! with the newest record and reports any difference as a deviation.
//!
//! This module reads and writes the lock file and computes hashes; it never
//! looks inside data or results.

pub mod audit;
pub mod dry_run;
pub mod history;
pub mod lock;

use sha2::{Digest, Sha256};

/// Lowercase hexadecimal SHA-256 of `bytes`, as `sha256sum` prints it.
pub fn sha256_hex(bytes: &[u8]) -> String {
    let digest = Sha256::digest(bytes);
    let mut text = String::with_capacity(64);
    for byte in digest.iter() {
        text.push_str(&format!("{byte:02x}"));
    }
    text
}

/// The version of this build of cairn, stamped into every output.
pub const TOOL_VERSION: &str = env!("CARGO_PKG_VERSION");

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn known_digests() {
        // FIPS 180-2 appendix B.1 test vector ("abc"); the empty-string digest is common practice.
        assert_eq!(
            sha256_hex(b"abc"),
            "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
        );
        assert_eq!(
            sha256_hex(b""),
            "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855"
        );
    }
}
