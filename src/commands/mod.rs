//! One file per subcommand. Each exposes an `Args` struct (clap) and `run(args)`.

pub mod demo;
pub mod spectrum;
pub mod solve;
pub mod simulate;
