//! Optional bundle signatures (Ed25519, RFC 8032): the signature block at the end of a signed
//! bundle, the key files, signing, and the check a server makes against its trusted keys.
//!
//! A bundle stays one file, so the rollout can still publish it with one rename. Signing sets
//! bit 1 of the header's flags ([`FLAG_SIGNED`]) and appends one [`SIGNATURE_BLOCK_LEN`]-byte
//! block after the data section; an unsigned bundle is byte for byte what it was before
//! signatures existed. (Bit 0 stays unassigned: the reader's tests use it as their example of
//! an unknown flag.)
//!
//! | bytes of the block | content |
//! |---|---|
//! | 0..8 | magic `CVBSIG\r\n` |
//! | 8..12 | algorithm (u32 little-endian; 1 = Ed25519) |
//! | 12..16 | reserved, zero |
//! | 16..48 | the signer's public key (32 bytes, RFC 8032 §5.1.5 encoding) |
//! | 48..112 | the signature (64 bytes, RFC 8032 §5.1.6) |
//! | 112..128 | reserved, zero (keeps a signed file a multiple of 64 bytes) |
//!
//! What is signed: every byte before the block (the header with its flag set, the manifest
//! — which holds the data section's SHA-256 — the padding and the data), hashed with SHA-256,
//! behind a prefix of our own: the message is [`SIGNING_DOMAIN`] followed by that 32-byte
//! digest. The prefix keeps a bundle signature from ever being valid for any other message the
//! same key might sign; hashing first lets a large bundle be signed without a second copy in
//! memory. Stripping the block (and clearing the flag) leaves an unsigned bundle, which a
//! server with trusted keys refuses; changing any signed byte breaks the signature.
//!
//! Key files are one line of text each (lines starting with `#` are comments):
//! `convoy-ed25519-public <64 hex digits>` and `convoy-ed25519-secret <64 hex digits>` (the
//! 32-byte RFC 8032 secret seed). The secret file is created with mode 0600 and neither file
//! is ever overwritten. A key is shown by its fingerprint, `ed25519:` and the first 8 bytes of
//! the SHA-256 of the public key in hex.
//!
//! [`crate::bundle::Bundle`] parses the block's structure; whether its key is trusted and its
//! signature valid is [`check_signature`]'s question (a server's `signature` load step, and
//! `convoy inspect`).

use std::path::{Path, PathBuf};

use ed25519_dalek::{Signer, SigningKey, VerifyingKey};
use sha2::{Digest, Sha256};

use super::error::BundleError;
use super::reader::Bundle;
use super::{HEADER_LEN, hex};

/// Header flag: a signature block follows the data section.
pub const FLAG_SIGNED: u32 = 1 << 1;
/// Length of the signature block.
pub const SIGNATURE_BLOCK_LEN: usize = 128;
/// First bytes of the signature block (not ASCII-only for the same reason as the bundle's
/// magic: a text-mode transfer damages it visibly).
pub const BLOCK_MAGIC: [u8; 8] = *b"CVBSIG\r\n";
/// The algorithm number of Ed25519 in the block.
pub const ALGORITHM_ED25519: u32 = 1;
/// Prefix of every signed message (domain separation).
pub const SIGNING_DOMAIN: &[u8] = b"convoy bundle signature v1\0";

const PUBLIC_TAG: &str = "convoy-ed25519-public";
const SECRET_TAG: &str = "convoy-ed25519-secret";

/// The signature block of a signed bundle, as read (not yet checked against any key).
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct SignatureBlock {
    pub public_key: [u8; 32],
    pub signature: [u8; 64],
}

impl SignatureBlock {
    /// Reads a block's structure.
    ///
    /// # Errors
    /// [`BundleError::SignatureBlock`] for a wrong length, magic, algorithm or non-zero
    /// reserved bytes.
    pub fn parse(block: &[u8]) -> Result<SignatureBlock, BundleError> {
        let bad = |problem| BundleError::SignatureBlock { problem };
        if block.len() != SIGNATURE_BLOCK_LEN {
            return Err(bad("the block has the wrong length"));
        }
        if block[0..8] != BLOCK_MAGIC {
            return Err(bad("the block does not start with its magic bytes"));
        }
        let algorithm = u32::from_le_bytes([block[8], block[9], block[10], block[11]]);
        if algorithm != ALGORITHM_ED25519 {
            return Err(bad(
                "unknown signature algorithm (this convoy knows Ed25519)",
            ));
        }
        if block[12..16].iter().chain(&block[112..]).any(|&b| b != 0) {
            return Err(bad("reserved bytes are not zero"));
        }
        let mut public_key = [0u8; 32];
        public_key.copy_from_slice(&block[16..48]);
        let mut signature = [0u8; 64];
        signature.copy_from_slice(&block[48..112]);
        Ok(SignatureBlock {
            public_key,
            signature,
        })
    }

    pub fn to_bytes(&self) -> [u8; SIGNATURE_BLOCK_LEN] {
        let mut b = [0u8; SIGNATURE_BLOCK_LEN];
        b[0..8].copy_from_slice(&BLOCK_MAGIC);
        b[8..12].copy_from_slice(&ALGORITHM_ED25519.to_le_bytes());
        b[16..48].copy_from_slice(&self.public_key);
        b[48..112].copy_from_slice(&self.signature);
        b
    }

    /// The signer's fingerprint.
    pub fn fingerprint(&self) -> String {
        fingerprint(&self.public_key)
    }
}

/// `ed25519:` and the first 8 bytes of SHA-256(public key), hex: short enough to read aloud,
/// long enough that two keys of one team do not collide by accident.
pub fn fingerprint(public_key: &[u8; 32]) -> String {
    format!("ed25519:{}", hex(&Sha256::digest(public_key)[..8]))
}

/// The message an Ed25519 signature of a bundle covers: [`SIGNING_DOMAIN`] and the SHA-256 of
/// every byte before the signature block.
pub fn signed_message(signed_part: &[u8]) -> Vec<u8> {
    signed_message_of_digest(&Sha256::digest(signed_part).into())
}

/// [`signed_message`] from the SHA-256 of the signed part, when it is already known
/// ([`Bundle::signed_part_sha256`]).
fn signed_message_of_digest(digest: &[u8; 32]) -> Vec<u8> {
    let mut m = Vec::with_capacity(SIGNING_DOMAIN.len() + 32);
    m.extend_from_slice(SIGNING_DOMAIN);
    m.extend_from_slice(digest);
    m
}

/// A public key trusted to sign bundles.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct PublicKey {
    key: VerifyingKey,
}

impl PublicKey {
    /// A key from its 32 bytes.
    ///
    /// # Errors
    /// Bytes that are not a point of the curve, or a weak (small-order) key.
    pub fn from_bytes(bytes: &[u8; 32]) -> Result<PublicKey, &'static str> {
        let key = VerifyingKey::from_bytes(bytes).map_err(|_| "not a valid Ed25519 public key")?;
        if key.is_weak() {
            return Err("a weak (small-order) Ed25519 key");
        }
        Ok(PublicKey { key })
    }

    pub fn to_bytes(&self) -> [u8; 32] {
        self.key.to_bytes()
    }

    pub fn fingerprint(&self) -> String {
        fingerprint(self.key.as_bytes())
    }

    /// Reads a public key file.
    ///
    /// # Errors
    /// An unreadable file, or one that is not a public key file.
    pub fn read(path: &Path) -> Result<PublicKey, KeyError> {
        let bytes = read_key_line(path, PUBLIC_TAG)?;
        PublicKey::from_bytes(&bytes).map_err(|problem| KeyError::Format {
            path: path.to_path_buf(),
            problem: problem.to_string(),
        })
    }

    /// The key file's text.
    pub fn to_file_text(&self) -> String {
        format!(
            "# convoy bundle signing public key {}\n{PUBLIC_TAG} {}\n",
            self.fingerprint(),
            hex(self.key.as_bytes())
        )
    }

    fn verify(&self, message: &[u8], signature: &[u8; 64]) -> bool {
        let signature = ed25519_dalek::Signature::from_bytes(signature);
        // Strict: refuses non-canonical encodings, so one bundle has one valid signature per
        // key (RFC 8032 §5.1.7 leaves malleability to the verifier).
        self.key.verify_strict(message, &signature).is_ok()
    }
}

/// A secret signing key.
pub struct SecretKey {
    key: SigningKey,
}

impl std::fmt::Debug for SecretKey {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        // Never the secret itself, not even in a debug log.
        write!(f, "SecretKey({})", self.public().fingerprint())
    }
}

impl SecretKey {
    /// A key from its 32-byte RFC 8032 secret.
    pub fn from_bytes(bytes: &[u8; 32]) -> SecretKey {
        SecretKey {
            key: SigningKey::from_bytes(bytes),
        }
    }

    /// A new key from the operating system's random source.
    ///
    /// # Errors
    /// [`KeyError::Random`] when the system has no random source to give.
    pub fn generate() -> Result<SecretKey, KeyError> {
        let mut seed = [0u8; 32];
        getrandom::fill(&mut seed).map_err(|e| KeyError::Random {
            reason: e.to_string(),
        })?;
        Ok(SecretKey::from_bytes(&seed))
    }

    pub fn public(&self) -> PublicKey {
        PublicKey {
            key: self.key.verifying_key(),
        }
    }

    /// Reads a secret key file.
    ///
    /// # Errors
    /// An unreadable file, or one that is not a secret key file.
    pub fn read(path: &Path) -> Result<SecretKey, KeyError> {
        Ok(SecretKey::from_bytes(&read_key_line(path, SECRET_TAG)?))
    }

    /// Signs `message` (RFC 8032 Ed25519, pure).
    pub fn sign(&self, message: &[u8]) -> [u8; 64] {
        self.key.sign(message).to_bytes()
    }

    fn to_file_text(&self) -> String {
        format!(
            "# convoy bundle signing SECRET key {}; keep it private\n{SECRET_TAG} {}\n",
            self.public().fingerprint(),
            hex(self.key.as_bytes())
        )
    }
}

/// Why a key file could not be read or written.
#[derive(Debug, thiserror::Error)]
pub enum KeyError {
    #[error("{path}: {source}")]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("{path}: {problem}")]
    Format { path: PathBuf, problem: String },
    #[error("{path} exists; key files are never overwritten")]
    Exists { path: PathBuf },
    #[error("no random bytes from the operating system: {reason}")]
    Random { reason: String },
}

fn read_key_line(path: &Path, tag: &str) -> Result<[u8; 32], KeyError> {
    let format = |problem: String| KeyError::Format {
        path: path.to_path_buf(),
        problem,
    };
    let text = std::fs::read_to_string(path).map_err(|source| KeyError::Io {
        path: path.to_path_buf(),
        source,
    })?;
    let line = text
        .lines()
        .map(str::trim)
        .find(|l| !l.is_empty() && !l.starts_with('#'))
        .ok_or_else(|| format(format!("no key line (expected `{tag} <64 hex digits>`)")))?;
    let (found_tag, value) = line.split_once(char::is_whitespace).unwrap_or((line, ""));
    if found_tag != tag {
        let hint = if found_tag == PUBLIC_TAG || found_tag == SECRET_TAG {
            format!("this is a {found_tag} key file, {tag} expected")
        } else {
            format!("not a key file of ours (expected `{tag} <64 hex digits>`)")
        };
        return Err(format(hint));
    }
    parse_hex32(value.trim()).ok_or_else(|| format("the key is not 64 hex digits".into()))
}

fn parse_hex32(s: &str) -> Option<[u8; 32]> {
    if s.len() != 64 || !s.is_ascii() {
        return None;
    }
    let mut out = [0u8; 32];
    for (i, byte) in out.iter_mut().enumerate() {
        *byte = u8::from_str_radix(&s[2 * i..2 * i + 2], 16).ok()?;
    }
    Some(out)
}

/// Makes a new key pair and writes both files (the secret one readable by its owner only).
///
/// # Errors
/// Either file exists, a folder cannot be written, no random source.
pub fn write_new_key_pair(secret: &Path, public: &Path) -> Result<PublicKey, KeyError> {
    for path in [secret, public] {
        if path.exists() {
            return Err(KeyError::Exists {
                path: path.to_path_buf(),
            });
        }
    }
    let key = SecretKey::generate()?;
    write_new_file(secret, key.to_file_text().as_bytes(), true)?;
    let public_key = key.public();
    write_new_file(public, public_key.to_file_text().as_bytes(), false)?;
    Ok(public_key)
}

fn write_new_file(path: &Path, bytes: &[u8], private: bool) -> Result<(), KeyError> {
    use std::io::Write;
    let mut options = std::fs::OpenOptions::new();
    // create_new: a key file is never replaced, and a file planted between the existence
    // check and now is not written through.
    options.write(true).create_new(true);
    #[cfg(unix)]
    {
        use std::os::unix::fs::OpenOptionsExt;
        options.mode(if private { 0o600 } else { 0o644 });
    }
    #[cfg(not(unix))]
    let _ = private;
    let io = |source: std::io::Error| {
        if source.kind() == std::io::ErrorKind::AlreadyExists {
            KeyError::Exists {
                path: path.to_path_buf(),
            }
        } else {
            KeyError::Io {
                path: path.to_path_buf(),
                source,
            }
        }
    };
    let mut f = options.open(path).map_err(io)?;
    f.write_all(bytes).map_err(io)?;
    f.sync_all().map_err(io)
}

/// Signs a bundle: verifies `bytes` as a bundle, drops any signature it had, sets
/// [`FLAG_SIGNED`] and appends a block signed by `key`. The result is read back and its
/// signature checked before it is returned.
///
/// # Errors
/// Anything [`Bundle::from_bytes`] refuses in `bytes`.
pub fn sign_bundle(bytes: Vec<u8>, key: &SecretKey) -> Result<Vec<u8>, BundleError> {
    let bundle = Bundle::from_bytes(bytes)?;
    let mut out = Vec::with_capacity(bundle.signed_part().len() + SIGNATURE_BLOCK_LEN);
    out.extend_from_slice(bundle.signed_part());
    drop(bundle);
    let flags = u32::from_le_bytes([out[12], out[13], out[14], out[15]]) | FLAG_SIGNED;
    out[12..16].copy_from_slice(&flags.to_le_bytes());
    debug_assert!(out.len() >= HEADER_LEN);
    let block = SignatureBlock {
        public_key: key.public().to_bytes(),
        signature: key.sign(&signed_message(&out)),
    };
    out.extend_from_slice(&block.to_bytes());
    let signed = Bundle::from_bytes(out)?;
    debug_assert!(check_signature(&signed, Trust::Keys(&[key.public()])).is_ok());
    Ok(signed.into_bytes())
}

/// Which keys a signature may be by.
#[derive(Clone, Copy, Debug)]
pub enum Trust<'a> {
    /// Only these.
    Keys(&'a [PublicKey]),
    /// The key the block names (proves the bundle is intact since it was signed, not who
    /// signed it): what `convoy inspect` reports.
    Embedded,
}

/// Why a bundle's signature is not accepted.
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
pub enum SignatureProblem {
    #[error("the bundle is not signed, and only bundles signed by a trusted key are accepted")]
    Unsigned,
    #[error("signed by {fingerprint}, which is not a trusted key")]
    UnknownKey { fingerprint: String },
    #[error("the block names key {fingerprint}, which is not a valid Ed25519 public key")]
    InvalidKey { fingerprint: String },
    #[error(
        "bad signature: the bytes signed by {fingerprint} have changed since (or the signature is damaged)"
    )]
    BadSignature { fingerprint: String },
}

/// Checks a bundle's signature against `trust`; on success, the signer's fingerprint.
///
/// # Errors
/// [`SignatureProblem`]: unsigned, a key not trusted, a signature that does not verify.
pub fn check_signature(bundle: &Bundle, trust: Trust<'_>) -> Result<String, SignatureProblem> {
    let block = bundle.signature().ok_or(SignatureProblem::Unsigned)?;
    let fingerprint = block.fingerprint();
    let key = match trust {
        Trust::Keys(keys) => keys
            .iter()
            .find(|k| k.to_bytes() == block.public_key)
            .cloned()
            .ok_or_else(|| SignatureProblem::UnknownKey {
                fingerprint: fingerprint.clone(),
            })?,
        Trust::Embedded => {
            PublicKey::from_bytes(&block.public_key).map_err(|_| SignatureProblem::InvalidKey {
                fingerprint: fingerprint.clone(),
            })?
        }
    };
    if key.verify(
        &signed_message_of_digest(bundle.signed_part_sha256()),
        &block.signature,
    ) {
        Ok(fingerprint)
    } else {
        Err(SignatureProblem::BadSignature { fingerprint })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn hex_keys_parse_and_refuse_garbage() {
        assert_eq!(parse_hex32(&"ab".repeat(32)), Some([0xab; 32]));
        assert_eq!(parse_hex32(&"ab".repeat(31)), None);
        assert_eq!(parse_hex32(&"zz".repeat(32)), None);
        // Multi-byte characters must not panic on slicing.
        assert_eq!(parse_hex32(&"é".repeat(32)), None);
    }

    #[test]
    fn block_round_trips_and_refuses_damage() {
        let block = SignatureBlock {
            public_key: [7; 32],
            signature: [9; 64],
        };
        let bytes = block.to_bytes();
        assert_eq!(SignatureBlock::parse(&bytes).unwrap(), block);
        for at in [0, 8, 12, 127] {
            let mut b = bytes;
            b[at] ^= 1;
            assert!(SignatureBlock::parse(&b).is_err(), "byte {at}");
        }
    }
}
