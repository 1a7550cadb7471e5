//! `convoy key new` and `convoy sign`: key pairs for bundle signatures, and signing a bundle
//! in place. The format of keys and signatures is in [`crate::bundle::signature`].

use std::path::PathBuf;

use super::CliError;
use crate::bundle::signature::{SecretKey, sign_bundle, write_new_key_pair};
use crate::bundle::write_atomically;

/// Flags of `convoy key`.
#[derive(Clone, Debug, clap::Args)]
pub struct KeyArgs {
    #[command(subcommand)]
    pub action: KeyAction,
}

#[derive(Clone, Debug, clap::Subcommand)]
pub enum KeyAction {
    /// Make a new Ed25519 key pair (neither file may exist yet).
    New {
        /// Where to write the secret key (created readable by its owner only).
        #[arg(long, value_name = "FILE")]
        secret: PathBuf,
        /// Where to write the public key (for the server's trusted_keys).
        #[arg(long, value_name = "FILE")]
        public: PathBuf,
    },
}

/// Flags of `convoy sign`.
#[derive(Clone, Debug, clap::Args)]
pub struct SignArgs {
    /// The bundle (.cvb) to sign; it is replaced by its signed form.
    pub bundle: PathBuf,
    /// The secret key file (from `convoy key new`).
    #[arg(long, value_name = "FILE")]
    pub secret_key: PathBuf,
}

/// Runs `convoy key`.
///
/// # Errors
/// A key file that exists already or cannot be written.
pub fn key(args: &KeyArgs) -> Result<(), CliError> {
    match &args.action {
        KeyAction::New { secret, public } => {
            let key = write_new_key_pair(secret, public)?;
            println!(
                "key {}: secret {}, public {}",
                key.fingerprint(),
                secret.display(),
                public.display()
            );
            Ok(())
        }
    }
}

/// Runs `convoy sign`.
///
/// # Errors
/// An unreadable key or bundle, a bundle that does not verify, a failed write.
pub fn sign(args: &SignArgs) -> Result<(), CliError> {
    let key = SecretKey::read(&args.secret_key)?;
    // Read whole, not mapped: the file is replaced below.
    let bytes = std::fs::read(&args.bundle).map_err(|source| CliError::File {
        path: args.bundle.clone(),
        source,
    })?;
    let signed = sign_bundle(bytes, &key)?;
    write_atomically(&args.bundle, &signed)?;
    println!(
        "{}: signed by {}",
        args.bundle.display(),
        key.public().fingerprint()
    );
    Ok(())
}
