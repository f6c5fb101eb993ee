//! The node simulator: machines, sensor nodes and their compressively sampled streams, so the
//! gateway can be run and tested without hardware.
//!
//! - [`machine`]: signal models of rotating machines (shaft harmonics with slow speed wander,
//!   gear mesh and sidebands, bearing-defect impacts ringing a resonance, blade pass,
//!   broadband noise) and the bearing fault frequencies.
//! - [`scenario`]: the TOML scenario file (site, nodes, channels, machines), checked once.
//! - [`run`]: windowing, random sampling, quantization, frame building, and the outputs
//!   (packet log, TCP through the fault-injecting sender).
//! - [`truth`] (feature `hdf5-store`): the noise-free truth as an HDF5 file in the record layout.
//!
//! The truth a run can keep is the noise-free signal of each channel at the full grid rate:
//! every deterministic and impulsive source through the channel's mix. The machine's broadband
//! noise, the sensor noise and the ADC quantization are added only to what is sampled.
//!
//! ```
//! use csgate::sim::{Scenario, Simulation};
//! let text = r#"
//! [site]
//! name = "Doc bench"
//! [[node]]
//! id = 1
//! sample_rate_hz = 8192.0
//! window_len = 1024
//! ratio = 0.25
//! index_encoding = "seed"
//! value_encoding = "i16"
//! [[node.channel]]
//! channel = 0
//! kind = "vibration"
//! units = "m/s^2"
//! full_scale = 20.0
//! [node.machine]
//! shaft_hz = 24.5
//! harmonics = [{ order = 1, amplitude = 1.0 }]
//! "#;
//! let scenario = Scenario::from_toml_str(text, "doc.toml".as_ref()).unwrap();
//! let mut sim = Simulation::new(&scenario, 1.0, false);
//! let w = sim.next_window().unwrap().unwrap();
//! assert_eq!(w.packets[0].sample_count(), 256);
//! assert_eq!(sim.remaining(), 14); // (8192 - 1024) / 512 + 1 = 15 windows in 1 s, 1 taken
//! ```

pub mod advised;
pub mod machine;
pub mod run;
pub mod scenario;
#[cfg(feature = "hdf5-store")]
pub mod truth;

pub use machine::{
    BearingGeometry, ChannelMix, DefectKind, FaultFrequencies, MachineSpec, MachineSynth,
};
pub use run::{NodeSim, RunSummary, SimError, SimWindow, Simulation, TruthChunk};
pub use scenario::{NodeSpec, Scenario, ScenarioError};
