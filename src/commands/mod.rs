//! One file per subcommand. Each exposes an `Args` struct (clap) and `run(args)`.

pub mod demo;
pub mod simulate;
