//! Scenario files: the site, its sensor nodes, their channels and machines, in TOML.
//!
//! [`Scenario::load`] reads and checks a file once; everything downstream trusts the result.
//! Unknown keys are rejected (serde's `deny_unknown_fields`, which names the key and, through
//! the TOML parser, the line), and every range check names its key as a dotted path such as
//! `node[1].machine.bearing.defect.resonance_hz`.
//!
//! ```toml
//! [site]
//! name = "Example works"
//! start_time = "2025-03-01T06:00:00Z"   # t0 of the first window (default 2025-01-01T00:00:00Z)
//! seed = 7                              # default 1; `csgate simulate --seed` overrides it
//!
//! [[node]]
//! id = 11
//! name = "F-1 supply fan"
//! sample_rate_hz = 25600.0
//! window_len = 4096
//! hop_len = 2048            # default window_len / 2
//! ratio = 0.25              # m / n
//! index_encoding = "seed"   # or "list"
//! value_encoding = "i16"    # or "f32"
//! adc_bits = 16
//!
//! [[node.channel]]
//! channel = 0
//! kind = "vibration"        # or "acoustic"
//! units = "m/s^2"           # counts, m/s^2, g, mm/s, Pa, V, um
//! full_scale = 50.0         # units at ADC full scale (or sensitivity_v_per_unit with
//!                           # the node's adc_full_scale_v)
//!
//! [node.machine]
//! shaft_rpm = 1480.0
//! harmonics = [{ order = 1, amplitude = 0.4 }]
//! ```
//!
//! The machine table is [`MachineSpec`]; `configs/demo-site.toml` uses every part of it.

use super::machine::{ChannelMix, MachineSpec};
use crate::packet::{Limits, NodeKey, Units};
use serde::Deserialize;
use std::collections::HashSet;
use std::path::{Path, PathBuf};

/// Errors of loading a scenario. Each names the file; range errors also name the key.
#[derive(Debug, thiserror::Error)]
pub enum ScenarioError {
    /// The file could not be read.
    #[error("scenario {path}: {source}")]
    Io {
        /// The file.
        path: PathBuf,
        /// The cause.
        source: std::io::Error,
    },
    /// Not valid TOML, or a key is unknown, missing or of the wrong type.
    #[error("scenario {path}: {message}")]
    Parse {
        /// The file.
        path: PathBuf,
        /// The parser's message, with line, column and key.
        message: String,
    },
    /// A value is out of range or inconsistent with another.
    #[error("scenario {path}: {key}: {message}")]
    Invalid {
        /// The file.
        path: PathBuf,
        /// Dotted key path, e.g. `node[0].window_len`.
        key: String,
        /// What is wrong.
        message: String,
    },
}

/// A checked scenario: the site and its nodes.
#[derive(Debug, Clone, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Scenario {
    /// The site.
    pub site: SiteSpec,
    /// The sensor nodes, each with its machine.
    #[serde(rename = "node", default)]
    pub nodes: Vec<NodeSpec>,
}

fn default_start_time() -> String {
    DEFAULT_START_TIME.to_owned()
}

/// Start time used when a scenario gives none: a fixed instant, so that runs are reproducible.
pub const DEFAULT_START_TIME: &str = "2025-01-01T00:00:00Z";

fn default_seed() -> u64 {
    1
}

/// The site: names, start time and seed.
#[derive(Debug, Clone, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SiteSpec {
    /// Site name.
    pub name: String,
    /// Free-text description.
    #[serde(default)]
    pub description: String,
    /// Node-clock time of every stream's first grid instant, RFC 3339.
    #[serde(default = "default_start_time")]
    pub start_time: String,
    /// Seed of every random choice in the run.
    #[serde(default = "default_seed")]
    pub seed: u64,
}

/// How a node tells the gateway which instants it sampled.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum IndexEncoding {
    /// A seed per window; both sides regenerate the set with `packet::indices`.
    Seed,
    /// An explicit list (the encoder picks delta-varint or bitmap, whichever is smaller).
    List,
}

/// How sample values travel.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum ValueEncoding {
    /// Signed ADC counts; `scale` converts to units.
    I16,
    /// Quantized values already in units, as 32-bit floats.
    F32,
}

/// What a channel's sensor is.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum ChannelKind {
    /// An accelerometer or velocity sensor.
    Vibration,
    /// A microphone.
    Acoustic,
}

fn default_adc_bits() -> u8 {
    16
}

/// One sensor node.
#[derive(Debug, Clone, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct NodeSpec {
    /// Node id on the wire, unique in the scenario.
    pub id: u32,
    /// Label, e.g. the machine tag.
    #[serde(default)]
    pub name: String,
    /// ADC grid rate, hertz.
    pub sample_rate_hz: f64,
    /// Window length `n`, grid instants.
    pub window_len: u32,
    /// Hop between window starts, grid instants; default `window_len / 2`.
    #[serde(default)]
    pub hop_len: Option<u32>,
    /// Sampling ratio `m / n`, in (0, 1].
    pub ratio: f64,
    /// Index encoding.
    pub index_encoding: IndexEncoding,
    /// Value encoding.
    pub value_encoding: ValueEncoding,
    /// ADC resolution, bits. Default 16.
    #[serde(default = "default_adc_bits")]
    pub adc_bits: u8,
    /// ADC input range, volts at full scale; needed by channels given by sensitivity.
    #[serde(default)]
    pub adc_full_scale_v: Option<f64>,
    /// Key for the frame tags, hexadecimal; frames are unauthenticated without it.
    #[serde(default)]
    pub auth_key: Option<String>,
    /// The machine the node is mounted on.
    pub machine: MachineSpec,
    /// The node's channels.
    #[serde(rename = "channel", default)]
    pub channels: Vec<ChannelSpec>,
}

/// One channel of a node.
#[derive(Debug, Clone, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ChannelSpec {
    /// Channel number on the wire, unique within the node.
    pub channel: u16,
    /// Sensor kind.
    pub kind: ChannelKind,
    /// Physical units, by symbol: counts, m/s^2, g, mm/s, Pa, V, um.
    pub units: String,
    /// Units at ADC full scale. Give this or `sensitivity_v_per_unit`.
    #[serde(default)]
    pub full_scale: Option<f64>,
    /// Sensor sensitivity, volts per unit; full scale is then `adc_full_scale_v / sensitivity`.
    #[serde(default)]
    pub sensitivity_v_per_unit: Option<f64>,
    /// RMS of the sensor's own white noise, units; added before sampling, not in the truth.
    #[serde(default)]
    pub noise_rms: f64,
    /// Gains on the machine's sources.
    #[serde(default)]
    pub mix: ChannelMix,
}

impl Scenario {
    /// Reads and checks a scenario file.
    pub fn load(path: &Path) -> Result<Scenario, ScenarioError> {
        let text = std::fs::read_to_string(path).map_err(|source| ScenarioError::Io {
            path: path.to_owned(),
            source,
        })?;
        Scenario::from_toml_str(&text, path)
    }

    /// Parses and checks scenario text; `path` only names it in errors.
    pub fn from_toml_str(text: &str, path: &Path) -> Result<Scenario, ScenarioError> {
        let scenario: Scenario = toml::from_str(text).map_err(|e| ScenarioError::Parse {
            path: path.to_owned(),
            message: e.to_string().trim_end().to_owned(),
        })?;
        scenario
            .check()
            .map_err(|(key, message)| ScenarioError::Invalid {
                path: path.to_owned(),
                key,
                message,
            })?;
        Ok(scenario)
    }

    /// Start time of the run, microseconds since the Unix epoch.
    pub fn start_time_us(&self) -> i64 {
        parse_start_time(&self.site.start_time).expect("checked when loaded")
    }

    /// Sets the sampling ratio of every node (the `--ratio` override), checking it.
    pub fn override_ratio(&mut self, ratio: f64) -> Result<(), String> {
        for (i, node) in self.nodes.iter_mut().enumerate() {
            node.ratio = ratio;
            node.check()
                .map_err(|(key, msg)| format!("--ratio {ratio}: node[{i}].{key}: {msg}"))?;
        }
        Ok(())
    }

    /// Checks every rule; the error is (dotted key, message).
    fn check(&self) -> Result<(), (String, String)> {
        if self.site.name.trim().is_empty() {
            return Err(("site.name".into(), "must not be empty".into()));
        }
        if let Err(e) = parse_start_time(&self.site.start_time) {
            return Err(("site.start_time".into(), e));
        }
        if self.nodes.is_empty() {
            return Err(("node".into(), "the scenario has no [[node]]".into()));
        }
        let mut ids = HashSet::new();
        for (i, node) in self.nodes.iter().enumerate() {
            if !ids.insert(node.id) {
                return Err((
                    format!("node[{i}].id"),
                    format!("node id {} is used twice", node.id),
                ));
            }
            node.check()
                .map_err(|(key, msg)| (format!("node[{i}].{key}"), msg))?;
        }
        Ok(())
    }
}

fn parse_start_time(s: &str) -> Result<i64, String> {
    chrono::DateTime::parse_from_rfc3339(s)
        .map(|t| t.timestamp_micros())
        .map_err(|e| format!("{s:?} is not an RFC 3339 time ({e})"))
}

/// Parses a units symbol as written in scenario files.
pub fn parse_units(symbol: &str) -> Option<Units> {
    (0..=u8::MAX)
        .map_while(Units::from_code)
        .find(|u| u.symbol() == symbol)
}

impl Scenario {
    /// The kinematics of every node's machine, for labelling its peaks: `(node id, machine)`.
    pub fn machine_kinematics(&self) -> Vec<(u32, crate::features::kinematics::Kinematics)> {
        self.nodes.iter().map(|n| (n.id, n.kinematics())).collect()
    }
}

impl NodeSpec {
    /// What the analytics stage needs to know of this node's machine: the nominal shaft
    /// speed (given, not estimated; the simulated wander of +/-0.5% stays inside the labels'
    /// 2% tolerance), the bearing geometry and the gear's teeth. Blade pass has no label.
    pub fn kinematics(&self) -> crate::features::kinematics::Kinematics {
        use crate::features::kinematics::{BearingGeometry, GearMesh, Kinematics, ShaftSpeed};
        let m = &self.machine;
        Kinematics {
            shaft: ShaftSpeed::Hz(m.nominal_shaft_hz()),
            bearings: m
                .bearing
                .iter()
                .map(|b| BearingGeometry {
                    elements: b.rolling_elements,
                    element_diameter_mm: b.element_diameter_mm,
                    pitch_diameter_mm: b.pitch_diameter_mm,
                    contact_angle_deg: b.contact_angle_deg,
                })
                .collect(),
            gears: m
                .gear
                .iter()
                .map(|g| GearMesh {
                    teeth: g.teeth,
                    mating_teeth: None,
                })
                .collect(),
        }
    }

    /// Hop between window starts, grid instants.
    pub fn hop(&self) -> u32 {
        self.hop_len.unwrap_or(self.window_len / 2)
    }

    /// Samples per window, `m = round(ratio n)`.
    pub fn sample_count(&self) -> u32 {
        (self.ratio * f64::from(self.window_len)).round() as u32
    }

    /// The node's key, if it has one.
    pub fn key(&self) -> Option<NodeKey> {
        self.auth_key
            .as_deref()
            .map(|k| NodeKey::from_hex(k).expect("checked when loaded"))
    }

    /// Units of a channel of this node.
    pub fn units(&self, channel: &ChannelSpec) -> Units {
        parse_units(&channel.units).expect("checked when loaded")
    }

    /// Units at ADC full scale for a channel of this node.
    pub fn full_scale(&self, channel: &ChannelSpec) -> f64 {
        match (channel.full_scale, channel.sensitivity_v_per_unit) {
            (Some(fs), _) => fs,
            (None, Some(s)) => self.adc_full_scale_v.expect("checked when loaded") / s,
            (None, None) => unreachable!("checked when loaded"),
        }
    }

    /// Units per ADC count for a channel: full scale over `2^(bits - 1)`.
    pub fn count_scale(&self, channel: &ChannelSpec) -> f64 {
        self.full_scale(channel) / f64::from(1u32 << (self.adc_bits - 1))
    }

    fn check(&self) -> Result<(), (String, String)> {
        let bad = |key: &str, msg: String| Err((key.to_owned(), msg));
        if !(self.sample_rate_hz.is_finite() && self.sample_rate_hz > 0.0) {
            return bad(
                "sample_rate_hz",
                format!("{} must be positive", self.sample_rate_hz),
            );
        }
        let limits = Limits::default();
        if !(limits.min_window_len..=limits.max_window_len).contains(&self.window_len) {
            return bad(
                "window_len",
                format!(
                    "{} must be within {}..={}",
                    self.window_len, limits.min_window_len, limits.max_window_len
                ),
            );
        }
        let hop = self.hop();
        if hop == 0 || hop > self.window_len {
            return bad(
                "hop_len",
                format!("{hop} must be within 1..=window_len ({})", self.window_len),
            );
        }
        if !(self.ratio.is_finite() && self.ratio > 0.0 && self.ratio <= 1.0) {
            return bad("ratio", format!("{} must be within (0, 1]", self.ratio));
        }
        if self.sample_count() == 0 {
            return bad(
                "ratio",
                format!(
                    "{} leaves no sample in a window of {}",
                    self.ratio, self.window_len
                ),
            );
        }
        let max_bits = match self.value_encoding {
            ValueEncoding::I16 => 16,
            ValueEncoding::F32 => 24,
        };
        if !(2..=max_bits).contains(&self.adc_bits) {
            return bad(
                "adc_bits",
                format!("{} must be within 2..={max_bits}", self.adc_bits),
            );
        }
        if let Some(v) = self.adc_full_scale_v {
            if !(v.is_finite() && v > 0.0) {
                return bad("adc_full_scale_v", format!("{v} must be positive"));
            }
        }
        if let Some(k) = &self.auth_key {
            if let Err(e) = NodeKey::from_hex(k) {
                return bad("auth_key", e.to_string());
            }
        }
        self.machine
            .check(self.sample_rate_hz)
            .map_err(|e| split_key("machine", &e))?;
        if self.channels.is_empty() {
            return bad("channel", "the node has no [[node.channel]]".into());
        }
        let mut seen = HashSet::new();
        for (c, ch) in self.channels.iter().enumerate() {
            let key = |k: &str| format!("channel[{c}].{k}");
            if !seen.insert(ch.channel) {
                return Err((
                    key("channel"),
                    format!("channel {} is used twice", ch.channel),
                ));
            }
            if parse_units(&ch.units).is_none() {
                return Err((
                    key("units"),
                    format!(
                        "unknown units {:?} (known: counts, m/s^2, g, mm/s, Pa, V, um)",
                        ch.units
                    ),
                ));
            }
            match (ch.full_scale, ch.sensitivity_v_per_unit) {
                (Some(_), Some(_)) => {
                    return Err((
                        key("full_scale"),
                        "give full_scale or sensitivity_v_per_unit, not both".into(),
                    ))
                }
                (None, None) => {
                    return Err((
                        key("full_scale"),
                        "missing (give full_scale or sensitivity_v_per_unit)".into(),
                    ))
                }
                (None, Some(_)) if self.adc_full_scale_v.is_none() => {
                    return Err((
                        key("sensitivity_v_per_unit"),
                        "needs the node's adc_full_scale_v".into(),
                    ))
                }
                (None, Some(s)) if !(s.is_finite() && s > 0.0) => {
                    return Err((
                        key("sensitivity_v_per_unit"),
                        format!("{s} must be positive"),
                    ))
                }
                (Some(f), None) if !(f.is_finite() && f > 0.0) => {
                    return Err((key("full_scale"), format!("{f} must be positive")))
                }
                _ => {}
            }
            if !(ch.noise_rms.is_finite() && ch.noise_rms >= 0.0) {
                return Err((
                    key("noise_rms"),
                    format!("{} must be non-negative", ch.noise_rms),
                ));
            }
            ch.mix
                .check()
                .map_err(|e| split_key(&format!("channel[{c}].mix"), &e))?;
        }
        Ok(())
    }
}

/// Splits a "key: message" string from a nested check and prefixes the key.
fn split_key(prefix: &str, e: &str) -> (String, String) {
    match e.split_once(": ") {
        Some((k, m)) => (format!("{prefix}.{k}"), m.to_owned()),
        None => (prefix.to_owned(), e.to_owned()),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const MINIMAL: &str = r#"
[site]
name = "Test bench"

[[node]]
id = 1
sample_rate_hz = 25600.0
window_len = 4096
ratio = 0.25
index_encoding = "seed"
value_encoding = "i16"

[[node.channel]]
channel = 0
kind = "vibration"
units = "m/s^2"
full_scale = 50.0

[node.machine]
shaft_rpm = 1500.0
"#;

    fn load(text: &str) -> Result<Scenario, ScenarioError> {
        Scenario::from_toml_str(text, Path::new("test.toml"))
    }

    #[test]
    fn minimal_scenario_gets_defaults() {
        let s = load(MINIMAL).unwrap();
        let n = &s.nodes[0];
        assert_eq!(n.hop(), 2048);
        assert_eq!(n.sample_count(), 1024);
        assert_eq!(n.machine.nominal_shaft_hz(), 25.0);
        assert_eq!(s.site.seed, 1);
        assert_eq!(s.start_time_us(), 1_735_689_600_000_000);
        assert_eq!(n.count_scale(&n.channels[0]), 50.0 / 32768.0);
    }

    #[test]
    fn sensitivity_gives_full_scale() {
        let text = MINIMAL
            .replace("full_scale = 50.0", "sensitivity_v_per_unit = 0.01")
            .replace(
                "value_encoding = \"i16\"",
                "value_encoding = \"i16\"\nadc_full_scale_v = 2.5",
            );
        let s = load(&text).unwrap();
        assert!((s.nodes[0].full_scale(&s.nodes[0].channels[0]) - 250.0).abs() < 1e-9);
    }

    #[test]
    fn units_symbols_round_trip() {
        for u in ["counts", "m/s^2", "g", "mm/s", "Pa", "V", "um"] {
            assert_eq!(parse_units(u).unwrap().symbol(), u);
        }
        assert!(parse_units("furlong").is_none());
    }
}
