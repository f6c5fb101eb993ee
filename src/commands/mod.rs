//! One file per subcommand. Each exposes an `Args` struct (clap) and `run(args)`.

pub mod bench;
pub mod bench_fuzz;
pub mod demo;
#[cfg(feature = "hdf5-store")]
pub mod inspect;
pub mod loadtest;
pub mod plan;
pub mod publish;
pub mod replay;
pub mod score;
pub mod serve;
pub mod simulate;
pub mod solve;
pub mod spectrum;

/// Hex SHA-256 of a configuration's JSON form, written into records so that two records made
/// with different settings can be told apart.
pub fn config_digest<T: serde::Serialize>(config: &T) -> String {
    use sha2::Digest;
    let json = serde_json::to_vec(config).unwrap_or_default();
    let hash = sha2::Sha256::digest(&json);
    hash.iter().map(|b| format!("{b:02x}")).collect()
}
