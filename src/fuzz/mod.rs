//! Mutation fuzzing on stable Rust: seeded generators of valid inputs, mutators, and the
//! invariants every input decoder of the gateway must keep (no panic, bounded work, limits
//! respected, byte-exact round trips).
//!
//! Every case is a pure function of `(target, seed)`: [`run_case`] rebuilds the input from the
//! seed, so a failure printed with its seed is reproduced by running that one case again
//! (`csgate bench --fuzz 1 --fuzz-seed SEED --fuzz-targets TARGET`, or [`run_case`] in a test).
//! Each case runs under `catch_unwind`, so a panic is reported as a failure with its seed
//! rather than ending the run.
//!
//! Targets ([`Target`]):
//! - `frame`: whole-frame [`wire::check`] and [`wire::parse`] of mutated valid frames (every
//!   kind, every index coding, i16 and f32 values, with and without a tag) and of random bytes;
//!   a frame that parses re-encodes to the same bytes; a signed frame that was changed never
//!   verifies.
//! - `codec`: the streaming [`FrameCodec`] fed a run of frames (one possibly mutated) in random
//!   chunk sizes gives exactly what decoding the whole buffer at once gives, never holds a
//!   declared length above its maximum, and never emits a frame above it.
//! - `log`: the packet-log reader over mutated valid logs ends, returns only CRC-clean frames,
//!   and (for damage inside one record) still returns every other record.
//! - `config`: the `serve` configuration parser over valid files mutated as text and as TOML
//!   structure; errors never quote a node key.
//! - `record`: the record reader of `inspect` over a small valid record
//!   file mutated at random byte offsets; HDF5 library errors come back as errors.
//!
//! The generator is our own SplitMix64 (a few lines; `rand`'s generators are not documented as
//! stable across its releases, and a seed printed today must reproduce the same case later).

mod gen;
mod targets;

pub use targets::{record_case_input, run_case};

use std::fmt;
use std::time::{Duration, Instant};

/// SplitMix64 (Steele, Lea and Flood, "Fast splittable pseudorandom number generators",
/// OOPSLA 2014): small, fast, and fully determined by its 64-bit state.
#[derive(Debug, Clone)]
pub struct FuzzRng(u64);

impl FuzzRng {
    /// A generator from a seed.
    pub fn new(seed: u64) -> FuzzRng {
        FuzzRng(seed)
    }

    /// Next 64 random bits.
    pub fn next_u64(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }

    /// Uniform in `0..n` (`n > 0`; the modulo bias is irrelevant here).
    pub fn below(&mut self, n: usize) -> usize {
        (self.next_u64() % n.max(1) as u64) as usize
    }

    /// Uniform in `lo..=hi`.
    pub fn range(&mut self, lo: usize, hi: usize) -> usize {
        lo + self.below(hi - lo + 1)
    }

    /// True with probability `1/n`.
    pub fn one_in(&mut self, n: usize) -> bool {
        self.below(n) == 0
    }

    /// `k` random bytes.
    pub fn bytes(&mut self, k: usize) -> Vec<u8> {
        (0..k).map(|_| self.next_u64() as u8).collect()
    }
}

/// The seed of case `index` of a run started from `base` (distinct cases get unrelated seeds).
pub fn case_seed(base: u64, index: u64) -> u64 {
    FuzzRng::new(base ^ index.wrapping_mul(0xD1B5_4A32_D192_ED03)).next_u64()
}

/// What is fuzzed.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Target {
    /// Whole-frame check and parse, round trip, tag verification.
    Frame,
    /// The streaming codec in random chunk sizes.
    Codec,
    /// The packet-log reader.
    Log,
    /// The `serve` configuration parser.
    Config,
    /// The HDF5 record reader of `inspect`.
    Record,
}

impl Target {
    /// The in-memory targets, cheap per case.
    pub const FAST: [Target; 4] = [Target::Frame, Target::Codec, Target::Log, Target::Config];

    /// Every target this build has.
    pub fn all() -> Vec<Target> {
        let mut v = Target::FAST.to_vec();
        v.push(Target::Record);
        v
    }

    /// Name used on the command line and in reports.
    pub fn name(self) -> &'static str {
        match self {
            Target::Frame => "frame",
            Target::Codec => "codec",
            Target::Log => "log",
            Target::Config => "config",
            Target::Record => "record",
        }
    }
}

impl fmt::Display for Target {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

impl std::str::FromStr for Target {
    type Err = String;
    fn from_str(s: &str) -> Result<Target, String> {
        Target::all()
            .into_iter()
            .find(|t| t.name() == s)
            .ok_or_else(|| {
                let names: Vec<_> = Target::all().iter().map(|t| t.name()).collect();
                format!(
                    "unknown fuzz target {s:?}; expected one of {}",
                    names.join(", ")
                )
            })
    }
}

/// One case that broke an invariant.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Failure {
    /// The target.
    pub target: Target,
    /// The case seed ([`run_case`] with it reproduces the failure).
    pub seed: u64,
    /// What went wrong (a panic message or the broken invariant).
    pub message: String,
}

impl fmt::Display for Failure {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(
            f,
            "{} seed {:#018x}: {}",
            self.target, self.seed, self.message
        )
    }
}

/// Outcome of the cases of one target.
#[derive(Debug, Clone)]
pub struct TargetReport {
    /// The target.
    pub target: Target,
    /// Cases run.
    pub cases: u64,
    /// Cases whose input was accepted (parsed, decoded or opened without error).
    pub accepted: u64,
    /// Wall time.
    pub elapsed: Duration,
    /// Failures (at most [`MAX_FAILURES_KEPT`] kept; `failed` counts all).
    pub failures: Vec<Failure>,
    /// Number of failing cases.
    pub failed: u64,
    /// The slowest case: its wall time and seed (a hang would show here first).
    pub slowest: (Duration, u64),
    /// Of the failed cases: processes that died of a signal (record cases run in children).
    pub crashed: u64,
    /// Of the failed cases: children killed at the time limit.
    pub hung: u64,
}

impl TargetReport {
    /// Cases per second.
    pub fn rate(&self) -> f64 {
        self.cases as f64 / self.elapsed.as_secs_f64().max(1e-9)
    }
}

/// Failures kept per target (the rest are only counted).
pub const MAX_FAILURES_KEPT: usize = 20;

/// What one case did when it kept every invariant.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum CaseOutcome {
    /// The input was accepted.
    Accepted,
    /// The input was rejected with an error (the expected fate of most mutated inputs).
    Rejected,
}

/// Runs `cases` cases of `target` with seeds derived from `base_seed`, calling `progress(done)`
/// now and then. Panics inside a case are caught and reported as failures (the panic hook still
/// prints them; the bench command installs a quiet one).
pub fn run_target(
    target: Target,
    cases: u64,
    base_seed: u64,
    mut progress: impl FnMut(u64),
) -> TargetReport {
    let start = Instant::now();
    let mut report = TargetReport {
        target,
        cases: 0,
        accepted: 0,
        elapsed: Duration::ZERO,
        failures: Vec::new(),
        failed: 0,
        slowest: (Duration::ZERO, 0),
        crashed: 0,
        hung: 0,
    };
    for i in 0..cases {
        let seed = case_seed(base_seed, i);
        let t = Instant::now();
        let outcome = run_case(target, seed);
        let took = t.elapsed();
        if took > report.slowest.0 {
            report.slowest = (took, seed);
        }
        match outcome {
            Ok(CaseOutcome::Accepted) => report.accepted += 1,
            Ok(CaseOutcome::Rejected) => {}
            Err(f) => {
                report.failed += 1;
                if report.failures.len() < MAX_FAILURES_KEPT {
                    report.failures.push(f);
                }
            }
        }
        report.cases += 1;
        if i % 1024 == 0 {
            progress(i);
        }
    }
    progress(cases);
    report.elapsed = start.elapsed();
    report
}
