//! Machine signal models: what a rotating machine puts on its sensors, one grid instant at a
//! time.
//!
//! A [`MachineSynth`] advances a shaft whose speed wanders slowly around its nominal value and
//! produces, per instant, the separate sources of a [`SourceSample`]: shaft harmonics, gear
//! mesh with sidebands, bearing-defect impacts ringing a structural resonance, fan blade pass,
//! and the machine's broadband noise. Each sensor channel mixes these with its own gains
//! ([`ChannelMix`]); the simulator's run loop (`sim::run`) does the mixing, the measurement
//! noise and the sampling.
//!
//! Everything is deterministic from the seed handed to [`MachineSynth::new`], and the state is
//! a few numbers plus the impacts still ringing, so hour-long runs need no more memory than
//! short ones.
//!
//! ## Models and their sources
//! - Bearing fault frequencies: the kinematic formulas in [`BearingGeometry::fault_frequencies`]
//!   (Randall, *Vibration-based Condition Monitoring*, Wiley 2011; Randall & Antoni, "Rolling
//!   element bearing diagnostics: a tutorial", MSSP 2011; from memory).
//! - Defect signal: an impulse train whose every impact excites one structural resonance,
//!   `x(t) = sum_k A_k exp(-(t - t_k)/tau) sin(2 pi f_r (t - t_k))` for `t >= t_k`. The spacing
//!   of the impacts varies randomly by 1-2 % because the rolling elements slip (Randall &
//!   Antoni 2011, from memory). Inner-race impacts are amplitude-modulated at the shaft rate as
//!   the defect passes through the load zone; a rolling-element defect strikes both races once
//!   per spin revolution (2 x BSF) and is modulated at the cage rate (FTF) (same sources).
//! - Gear mesh: GMF = teeth x shaft rate, sidebands at GMF +/- k x shaft rate (Randall 2011,
//!   from memory).
//! - Fan blade pass: blades x shaft rate (common practice).

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;
use serde::Deserialize;
use std::f64::consts::TAU;

/// Rolling-element bearing geometry.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct BearingGeometry {
    /// Number of rolling elements, `Nb`.
    pub rolling_elements: u32,
    /// Rolling-element diameter `d`, millimetres.
    pub element_diameter_mm: f64,
    /// Pitch diameter `D`, millimetres.
    pub pitch_diameter_mm: f64,
    /// Contact angle `phi`, degrees (0 for a deep-groove ball bearing under radial load).
    pub contact_angle_deg: f64,
}

/// Kinematic bearing fault frequencies, in hertz, for one shaft rate.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FaultFrequencies {
    /// Ball pass frequency, outer race.
    pub bpfo_hz: f64,
    /// Ball pass frequency, inner race.
    pub bpfi_hz: f64,
    /// Ball (rolling element) spin frequency.
    pub bsf_hz: f64,
    /// Fundamental train (cage) frequency.
    pub ftf_hz: f64,
}

impl BearingGeometry {
    /// The fault frequencies at shaft rate `shaft_hz`, outer race fixed (Randall 2011;
    /// Randall & Antoni 2011; from memory):
    ///
    /// ```text
    /// BPFO = (Nb/2) fr (1 - (d/D) cos phi)
    /// BPFI = (Nb/2) fr (1 + (d/D) cos phi)
    /// BSF  = (D/(2d)) fr (1 - ((d/D) cos phi)^2)
    /// FTF  = (fr/2) (1 - (d/D) cos phi)
    /// ```
    pub fn fault_frequencies(&self, shaft_hz: f64) -> FaultFrequencies {
        let nb = f64::from(self.rolling_elements);
        let r = self.element_diameter_mm / self.pitch_diameter_mm
            * self.contact_angle_deg.to_radians().cos();
        FaultFrequencies {
            bpfo_hz: nb / 2.0 * shaft_hz * (1.0 - r),
            bpfi_hz: nb / 2.0 * shaft_hz * (1.0 + r),
            bsf_hz: self.pitch_diameter_mm / (2.0 * self.element_diameter_mm)
                * shaft_hz
                * (1.0 - r * r),
            ftf_hz: shaft_hz / 2.0 * (1.0 - r),
        }
    }

    /// Checks the geometry is physically possible; the message names the offending field.
    pub fn check(&self) -> Result<(), String> {
        if self.rolling_elements == 0 {
            return Err("rolling_elements: must be at least 1".into());
        }
        if !(self.element_diameter_mm.is_finite() && self.element_diameter_mm > 0.0) {
            return Err("element_diameter_mm: must be positive".into());
        }
        if !(self.pitch_diameter_mm.is_finite()
            && self.pitch_diameter_mm > self.element_diameter_mm)
        {
            return Err("pitch_diameter_mm: must exceed element_diameter_mm".into());
        }
        if !(self.contact_angle_deg.is_finite() && (0.0..90.0).contains(&self.contact_angle_deg)) {
            return Err("contact_angle_deg: must be within 0..90".into());
        }
        Ok(())
    }
}

/// Where a bearing defect sits.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum DefectKind {
    /// Spall on the outer race: impacts at BPFO, no modulation (fixed load zone).
    OuterRace,
    /// Spall on the inner race: impacts at BPFI, modulated at the shaft rate.
    InnerRace,
    /// Spall on a rolling element: impacts at 2 x BSF, modulated at FTF.
    RollingElement,
}

impl DefectKind {
    /// Impact rate of this defect in multiples of the shaft rate.
    pub fn impact_order(self, geometry: &BearingGeometry) -> f64 {
        let f = geometry.fault_frequencies(1.0);
        match self {
            DefectKind::OuterRace => f.bpfo_hz,
            DefectKind::InnerRace => f.bpfi_hz,
            DefectKind::RollingElement => 2.0 * f.bsf_hz,
        }
    }
}

fn default_jitter() -> f64 {
    // Middle of the 1-2 % slip range (Randall & Antoni 2011, from memory).
    0.015
}

fn default_modulation_depth() -> f64 {
    // Strong but not full load-zone modulation (common practice for simulated signals).
    0.5
}

/// A localized bearing defect and the resonance its impacts excite.
#[derive(Debug, Clone, Copy, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct DefectSpec {
    /// Which part is damaged.
    pub kind: DefectKind,
    /// Peak amplitude `A` of one impact response, channel units at gain 1.
    pub amplitude: f64,
    /// Structural resonance `f_r` the impacts ring, hertz.
    pub resonance_hz: f64,
    /// Decay time constant `tau` of the ringing, milliseconds.
    pub decay_ms: f64,
    /// Random variation of the impact spacing, a fraction of the mean spacing: each interval is
    /// drawn uniformly from `T (1 +/- jitter)`. Default 0.015.
    #[serde(default = "default_jitter")]
    pub jitter: f64,
    /// Depth of the amplitude modulation of inner-race and rolling-element impacts, 0..=1:
    /// `A_k = A (1 + depth cos theta_k)`, theta_k the shaft (inner race) or cage (rolling
    /// element) angle at the impact. Ignored for the outer race. Default 0.5.
    #[serde(default = "default_modulation_depth")]
    pub modulation_depth: f64,
}

impl DefectSpec {
    /// Checks ranges against the sample rate; the message names the offending field.
    pub fn check(&self, sample_rate_hz: f64) -> Result<(), String> {
        if !(self.amplitude.is_finite() && self.amplitude >= 0.0) {
            return Err("amplitude: must be finite and non-negative".into());
        }
        if !(self.resonance_hz.is_finite()
            && self.resonance_hz > 0.0
            && self.resonance_hz < sample_rate_hz / 2.0)
        {
            return Err(format!(
                "resonance_hz: {} must be within 0..{} (half the sample rate)",
                self.resonance_hz,
                sample_rate_hz / 2.0
            ));
        }
        if !(self.decay_ms.is_finite() && self.decay_ms > 0.0) {
            return Err("decay_ms: must be positive".into());
        }
        if !(self.jitter.is_finite() && (0.0..0.5).contains(&self.jitter)) {
            return Err("jitter: must be within 0..0.5".into());
        }
        if !(self.modulation_depth.is_finite() && (0.0..=1.0).contains(&self.modulation_depth)) {
            return Err("modulation_depth: must be within 0..=1".into());
        }
        Ok(())
    }
}

/// A rolling-element bearing on the machine's shaft.
#[derive(Debug, Clone, Copy, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct BearingSpec {
    /// Number of rolling elements, `Nb`.
    pub rolling_elements: u32,
    /// Rolling-element diameter `d`, millimetres.
    pub element_diameter_mm: f64,
    /// Pitch diameter `D`, millimetres.
    pub pitch_diameter_mm: f64,
    /// Contact angle `phi`, degrees. Default 0.
    #[serde(default)]
    pub contact_angle_deg: f64,
    /// A defect, if the bearing is damaged.
    #[serde(default)]
    pub defect: Option<DefectSpec>,
}

impl BearingSpec {
    /// The geometry, for the fault frequencies.
    pub fn geometry(&self) -> BearingGeometry {
        BearingGeometry {
            rolling_elements: self.rolling_elements,
            element_diameter_mm: self.element_diameter_mm,
            pitch_diameter_mm: self.pitch_diameter_mm,
            contact_angle_deg: self.contact_angle_deg,
        }
    }
}

/// One shaft harmonic `amplitude sin(2 pi order f_shaft t + phase)`.
#[derive(Debug, Clone, Copy, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Harmonic {
    /// Multiple of the shaft rate (1 = running speed).
    pub order: u32,
    /// Peak amplitude, channel units at gain 1.
    pub amplitude: f64,
    /// Phase, degrees.
    #[serde(default)]
    pub phase_deg: f64,
}

/// A pair of sidebands at GMF +/- order x shaft rate, each of the given amplitude.
#[derive(Debug, Clone, Copy, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Sideband {
    /// k in GMF +/- k f_shaft.
    pub order: u32,
    /// Peak amplitude of each of the two lines.
    pub amplitude: f64,
}

/// A gear on the machine's shaft meshing with another.
#[derive(Debug, Clone, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct GearSpec {
    /// Teeth `Z` of the gear on this shaft: GMF = Z f_shaft.
    pub teeth: u32,
    /// Peak amplitude of the mesh tone at 1 x GMF.
    pub amplitude: f64,
    /// Amplitudes of 2 x GMF, 3 x GMF, ... in order.
    #[serde(default)]
    pub harmonics: Vec<f64>,
    /// Modulation sidebands around 1 x GMF (a faulty or eccentric gear on this shaft).
    #[serde(default)]
    pub sidebands: Vec<Sideband>,
}

/// A fan or impeller: tones at multiples of the blade-pass frequency.
#[derive(Debug, Clone, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct BladePassSpec {
    /// Number of blades or vanes: BPF = blades x f_shaft.
    pub blades: u32,
    /// Peak amplitude at 1 x BPF.
    pub amplitude: f64,
    /// Amplitudes of 2 x BPF, 3 x BPF, ...
    #[serde(default)]
    pub harmonics: Vec<f64>,
}

/// A change in the machine's condition during a run, for trend and change-detection tests.
#[derive(Debug, Clone, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ChangeSpec {
    /// Time of the change, seconds from the start of the run.
    pub at_s: f64,
    /// A defect that replaces the bearing's (or appears) from `at_s` on. A larger `jitter`
    /// broadens the envelope-spectrum lines.
    #[serde(default)]
    pub defect: Option<DefectSpec>,
    /// Factor on every shaft-harmonic amplitude from `at_s` on.
    #[serde(default = "one")]
    pub harmonic_factor: f64,
    /// Factor on the broadband noise level from `at_s` on (a broadening spectrum).
    #[serde(default = "one")]
    pub broadband_factor: f64,
    /// Shaft harmonics that appear from `at_s` on, added to the machine's own (e.g. the
    /// train of harmonics of a loosening mounting): the spectrum becomes less sparse.
    #[serde(default)]
    pub harmonics: Vec<Harmonic>,
}

fn one() -> f64 {
    1.0
}

fn default_wander() -> f64 {
    // +/-0.5 %: an induction motor's speed moves this much with load and supply (common
    // practice).
    0.005
}

fn default_wander_period() -> f64 {
    20.0
}

/// The machine model of one node: a shaft and what it drives.
#[derive(Debug, Clone, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct MachineSpec {
    /// What the machine is, free text ("centrifugal pump", "fan").
    #[serde(default)]
    pub kind: String,
    /// Nominal shaft rate in hertz; give this or `shaft_rpm`.
    #[serde(default)]
    pub shaft_hz: Option<f64>,
    /// Nominal shaft rate in revolutions per minute; give this or `shaft_hz`.
    #[serde(default)]
    pub shaft_rpm: Option<f64>,
    /// Largest relative excursion of the slow speed wander (0.005 = +/-0.5 %).
    #[serde(default = "default_wander")]
    pub speed_wander: f64,
    /// Mean time between the wander's turning points, seconds.
    #[serde(default = "default_wander_period")]
    pub speed_wander_period_s: f64,
    /// Shaft harmonics (1 x unbalance, 2 x misalignment, ...).
    #[serde(default)]
    pub harmonics: Vec<Harmonic>,
    /// Gear mesh, if the shaft carries a gear.
    #[serde(default)]
    pub gear: Option<GearSpec>,
    /// Rolling-element bearing, if modelled.
    #[serde(default)]
    pub bearing: Option<BearingSpec>,
    /// Fan or impeller blade pass, if any.
    #[serde(default)]
    pub blade_pass: Option<BladePassSpec>,
    /// RMS of the machine's broadband (white) vibration, channel units at gain 1. Random, so
    /// not part of the noise-free truth.
    #[serde(default)]
    pub broadband_rms: f64,
    /// A condition change during the run.
    #[serde(default)]
    pub change: Option<ChangeSpec>,
}

impl MachineSpec {
    /// Nominal shaft rate in hertz (whichever of `shaft_hz`, `shaft_rpm` was given).
    ///
    /// # Panics
    /// If neither is set; [`MachineSpec::check`] rejects that.
    pub fn nominal_shaft_hz(&self) -> f64 {
        match (self.shaft_hz, self.shaft_rpm) {
            (Some(hz), _) => hz,
            (None, Some(rpm)) => rpm / 60.0,
            (None, None) => panic!("machine has no shaft speed; MachineSpec::check rejects this"),
        }
    }

    /// Checks every field against the sample rate; the message starts with the offending
    /// key, relative to the machine table.
    pub fn check(&self, sample_rate_hz: f64) -> Result<(), String> {
        let shaft_hz = match (self.shaft_hz, self.shaft_rpm) {
            (Some(_), Some(_)) => {
                return Err("shaft_hz: give shaft_hz or shaft_rpm, not both".into())
            }
            (None, None) => return Err("shaft_hz: missing (give shaft_hz or shaft_rpm)".into()),
            (Some(hz), None) => hz,
            (None, Some(rpm)) => rpm / 60.0,
        };
        if !(shaft_hz.is_finite() && shaft_hz > 0.0) {
            return Err("shaft_hz: the shaft speed must be positive".into());
        }
        if !(self.speed_wander.is_finite() && (0.0..0.5).contains(&self.speed_wander)) {
            return Err("speed_wander: must be within 0..0.5".into());
        }
        if !(self.speed_wander_period_s.is_finite() && self.speed_wander_period_s > 0.0) {
            return Err("speed_wander_period_s: must be positive".into());
        }
        let nyquist = sample_rate_hz / 2.0;
        let top_hz = shaft_hz * (1.0 + self.speed_wander);
        let below_nyquist = |what: String, order: f64| -> Result<(), String> {
            if order * top_hz >= nyquist {
                Err(format!(
                    "{what}: {:.1} Hz is not below half the sample rate ({nyquist} Hz)",
                    order * top_hz
                ))
            } else {
                Ok(())
            }
        };
        for (i, h) in self.harmonics.iter().enumerate() {
            if h.order == 0 {
                return Err(format!("harmonics[{i}].order: must be at least 1"));
            }
            check_amplitude(&format!("harmonics[{i}].amplitude"), h.amplitude)?;
            below_nyquist(format!("harmonics[{i}].order"), f64::from(h.order))?;
        }
        if let Some(g) = &self.gear {
            if g.teeth == 0 {
                return Err("gear.teeth: must be at least 1".into());
            }
            check_amplitude("gear.amplitude", g.amplitude)?;
            let top = (g.harmonics.len() + 1) as f64;
            below_nyquist("gear.harmonics".into(), top * f64::from(g.teeth))?;
            for (i, s) in g.sidebands.iter().enumerate() {
                if s.order == 0 || s.order >= g.teeth {
                    return Err(format!(
                        "gear.sidebands[{i}].order: must be within 1..teeth"
                    ));
                }
                check_amplitude(&format!("gear.sidebands[{i}].amplitude"), s.amplitude)?;
                below_nyquist(
                    format!("gear.sidebands[{i}].order"),
                    f64::from(g.teeth + s.order),
                )?;
            }
            for (i, &a) in g.harmonics.iter().enumerate() {
                check_amplitude(&format!("gear.harmonics[{i}]"), a)?;
            }
        }
        if let Some(b) = &self.blade_pass {
            if b.blades == 0 {
                return Err("blade_pass.blades: must be at least 1".into());
            }
            check_amplitude("blade_pass.amplitude", b.amplitude)?;
            let top = (b.harmonics.len() + 1) as f64;
            below_nyquist("blade_pass.harmonics".into(), top * f64::from(b.blades))?;
            for (i, &a) in b.harmonics.iter().enumerate() {
                check_amplitude(&format!("blade_pass.harmonics[{i}]"), a)?;
            }
        }
        if let Some(b) = &self.bearing {
            b.geometry().check().map_err(|e| format!("bearing.{e}"))?;
            if let Some(d) = &b.defect {
                d.check(sample_rate_hz)
                    .map_err(|e| format!("bearing.defect.{e}"))?;
            }
        }
        check_amplitude("broadband_rms", self.broadband_rms)?;
        if let Some(c) = &self.change {
            if !(c.at_s.is_finite() && c.at_s >= 0.0) {
                return Err("change.at_s: must be non-negative".into());
            }
            if let Some(d) = &c.defect {
                if self.bearing.is_none() {
                    return Err("change.defect: the machine has no [bearing] to carry it".into());
                }
                d.check(sample_rate_hz)
                    .map_err(|e| format!("change.defect.{e}"))?;
            }
            check_amplitude("change.harmonic_factor", c.harmonic_factor)?;
            check_amplitude("change.broadband_factor", c.broadband_factor)?;
            for (i, h) in c.harmonics.iter().enumerate() {
                if h.order == 0 {
                    return Err(format!("change.harmonics[{i}].order: must be at least 1"));
                }
                check_amplitude(&format!("change.harmonics[{i}].amplitude"), h.amplitude)?;
            }
        }
        Ok(())
    }
}

fn check_amplitude(key: &str, a: f64) -> Result<(), String> {
    if a.is_finite() && a >= 0.0 {
        Ok(())
    } else {
        Err(format!("{key}: {a} must be finite and non-negative"))
    }
}

/// How strongly one sensor channel sees each source (dimensionless gains, default 1).
#[derive(Debug, Clone, Copy, PartialEq, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct ChannelMix {
    /// Gain on the shaft harmonics.
    pub harmonics: f64,
    /// Gain on the gear mesh and its sidebands.
    pub gear: f64,
    /// Gain on the bearing-defect impacts.
    pub bearing: f64,
    /// Gain on the blade-pass tones.
    pub blade_pass: f64,
    /// Gain on the machine's broadband noise.
    pub broadband: f64,
}

impl Default for ChannelMix {
    fn default() -> Self {
        ChannelMix {
            harmonics: 1.0,
            gear: 1.0,
            bearing: 1.0,
            blade_pass: 1.0,
            broadband: 1.0,
        }
    }
}

impl ChannelMix {
    /// The noise-free value a channel with this mix sees.
    pub fn truth(&self, s: &SourceSample) -> f64 {
        self.harmonics * s.harmonics
            + self.gear * s.gear
            + self.bearing * s.bearing
            + self.blade_pass * s.blade_pass
    }

    /// Checks every gain is finite; the message names the offending key.
    pub fn check(&self) -> Result<(), String> {
        for (key, g) in [
            ("harmonics", self.harmonics),
            ("gear", self.gear),
            ("bearing", self.bearing),
            ("blade_pass", self.blade_pass),
            ("broadband", self.broadband),
        ] {
            if !g.is_finite() {
                return Err(format!("{key}: gain must be finite"));
            }
        }
        Ok(())
    }
}

/// The machine's sources at one grid instant, channel units at gain 1.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct SourceSample {
    /// Sum of the shaft harmonics.
    pub harmonics: f64,
    /// Gear mesh tones and sidebands.
    pub gear: f64,
    /// Bearing-defect impact responses.
    pub bearing: f64,
    /// Blade-pass tones.
    pub blade_pass: f64,
    /// Broadband noise (random: not part of the truth).
    pub broadband: f64,
}

/// One bearing-defect impact as generated: for tests and for inspection.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Impact {
    /// Time of the impact, seconds from the start of the run.
    pub t_s: f64,
    /// Peak amplitude `A_k` of its response.
    pub amplitude: f64,
}

/// An impact still ringing: its response at the current instant is `Im(z)`.
#[derive(Debug, Clone, Copy)]
struct Ringing {
    re: f64,
    im: f64,
    /// Per-sample rotation and decay `exp((-1/tau + i 2 pi f_r) / fs)`.
    rot_re: f64,
    rot_im: f64,
    /// Samples left before the response is negligible.
    left: u32,
}

/// The defect currently active, with what the impact loop derives from it.
#[derive(Debug, Clone, Copy)]
struct ActiveDefect {
    spec: DefectSpec,
    /// Impacts per shaft revolution.
    order: f64,
    rot_re: f64,
    rot_im: f64,
    /// Samples until `exp(-t/tau)` falls below 1e-5 (11.5 tau): below 16-bit resolution.
    ring_len: u32,
}

impl ActiveDefect {
    fn new(spec: DefectSpec, geometry: &BearingGeometry, sample_rate_hz: f64) -> ActiveDefect {
        let tau_s = spec.decay_ms * 1e-3;
        let decay = (-1.0 / (tau_s * sample_rate_hz)).exp();
        let w = TAU * spec.resonance_hz / sample_rate_hz;
        ActiveDefect {
            spec,
            order: spec.kind.impact_order(geometry),
            rot_re: decay * w.cos(),
            rot_im: decay * w.sin(),
            ring_len: (11.5 * tau_s * sample_rate_hz).ceil() as u32 + 1,
        }
    }
}

/// Slow random speed wander: smooth (raised-cosine) interpolation between random turning
/// points drawn uniformly in `+/-wander`, about one per `period_s`.
#[derive(Debug, Clone)]
struct SpeedWander {
    wander: f64,
    period_s: f64,
    from: f64,
    to: f64,
    seg_start_s: f64,
    seg_len_s: f64,
}

impl SpeedWander {
    fn new(wander: f64, period_s: f64, rng: &mut ChaCha8Rng) -> SpeedWander {
        let mut w = SpeedWander {
            wander,
            period_s,
            from: 0.0,
            to: 0.0,
            seg_start_s: 0.0,
            seg_len_s: period_s,
        };
        w.from = w.draw(rng);
        w.to = w.draw(rng);
        w.seg_len_s = w.draw_len(rng);
        w
    }

    fn draw(&self, rng: &mut ChaCha8Rng) -> f64 {
        if self.wander == 0.0 {
            0.0
        } else {
            rng.random_range(-self.wander..=self.wander)
        }
    }

    fn draw_len(&self, rng: &mut ChaCha8Rng) -> f64 {
        self.period_s * rng.random_range(0.5..1.5)
    }

    /// Relative speed deviation at `t_s`; `t_s` never decreases between calls.
    fn at(&mut self, t_s: f64, rng: &mut ChaCha8Rng) -> f64 {
        while t_s >= self.seg_start_s + self.seg_len_s {
            self.seg_start_s += self.seg_len_s;
            self.from = self.to;
            self.to = self.draw(rng);
            self.seg_len_s = self.draw_len(rng);
        }
        let s = (t_s - self.seg_start_s) / self.seg_len_s;
        self.from + (self.to - self.from) * 0.5 * (1.0 - (std::f64::consts::PI * s).cos())
    }
}

/// Generates a machine's sources sample by sample. Deterministic from its seed.
#[derive(Debug, Clone)]
pub struct MachineSynth {
    spec: MachineSpec,
    sample_rate_hz: f64,
    nominal_hz: f64,
    /// Next grid instant to generate.
    k: u64,
    /// Shaft angle in revolutions, kept in [0, 1): integer orders only need the fraction, and
    /// it keeps hour-long runs as precise as short ones.
    shaft_rev: f64,
    /// Cage angle in revolutions, [0, 1).
    cage_rev: f64,
    /// Cage revolutions per shaft revolution (FTF / f_shaft).
    cage_order: f64,
    wander: SpeedWander,
    wander_rng: ChaCha8Rng,
    impact_rng: ChaCha8Rng,
    noise_rng: ChaCha8Rng,
    defect: Option<ActiveDefect>,
    next_impact_s: Option<f64>,
    ringing: Vec<Ringing>,
    changed: bool,
    harmonic_factor: f64,
    broadband_factor: f64,
    last_impact: Option<Impact>,
}

impl MachineSynth {
    /// A machine at rest angle 0 at instant 0.
    ///
    /// # Panics
    /// If the spec has no shaft speed ([`MachineSpec::check`] rejects such specs).
    pub fn new(spec: &MachineSpec, sample_rate_hz: f64, seed: u64) -> MachineSynth {
        let mut wander_rng = ChaCha8Rng::seed_from_u64(seed);
        wander_rng.set_stream(1);
        let mut impact_rng = ChaCha8Rng::seed_from_u64(seed);
        impact_rng.set_stream(2);
        let mut noise_rng = ChaCha8Rng::seed_from_u64(seed);
        noise_rng.set_stream(3);
        let wander = SpeedWander::new(
            spec.speed_wander,
            spec.speed_wander_period_s,
            &mut wander_rng,
        );
        let geometry = spec.bearing.map(|b| b.geometry());
        let defect = spec.bearing.and_then(|b| {
            b.defect
                .map(|d| ActiveDefect::new(d, &b.geometry(), sample_rate_hz))
        });
        // The first impact falls at a random point of its first period, so that machines with
        // the same defect do not all strike at instant 0.
        let nominal_hz = spec.nominal_shaft_hz();
        let next_impact_s =
            defect.map(|d| impact_rng.random_range(0.0..1.0) / (d.order * nominal_hz));
        MachineSynth {
            spec: spec.clone(),
            sample_rate_hz,
            nominal_hz,
            k: 0,
            shaft_rev: 0.0,
            cage_rev: 0.0,
            cage_order: geometry.map_or(0.0, |g| g.fault_frequencies(1.0).ftf_hz),
            wander,
            wander_rng,
            impact_rng,
            noise_rng,
            defect,
            next_impact_s,
            ringing: Vec::new(),
            changed: false,
            harmonic_factor: 1.0,
            broadband_factor: 1.0,
            last_impact: None,
        }
    }

    /// Index of the next grid instant [`MachineSynth::next_sample`] will produce.
    pub fn position(&self) -> u64 {
        self.k
    }

    /// Instantaneous shaft rate at the next instant, hertz.
    pub fn shaft_hz(&mut self) -> f64 {
        let t = self.k as f64 / self.sample_rate_hz;
        self.nominal_hz * (1.0 + self.wander.at(t, &mut self.wander_rng))
    }

    /// The impact that started most recently, if any.
    pub fn last_impact(&self) -> Option<Impact> {
        self.last_impact
    }

    /// Produces the sources at the next grid instant and advances by one instant.
    pub fn next_sample(&mut self) -> SourceSample {
        let fs = self.sample_rate_hz;
        let t = self.k as f64 / fs;
        if !self.changed {
            if let Some(c) = self.spec.change.clone().filter(|c| t >= c.at_s) {
                self.apply_change(&c);
            }
        }
        let f_shaft = self.shaft_hz();
        let mut out = SourceSample::default();

        let theta = TAU * self.shaft_rev;
        for h in &self.spec.harmonics {
            out.harmonics +=
                h.amplitude * (f64::from(h.order) * theta + h.phase_deg.to_radians()).sin();
        }
        out.harmonics *= self.harmonic_factor;
        if let Some(g) = &self.spec.gear {
            let z = f64::from(g.teeth);
            out.gear = g.amplitude * (z * theta).sin();
            for (i, &a) in g.harmonics.iter().enumerate() {
                out.gear += a * ((i + 2) as f64 * z * theta).sin();
            }
            for s in &g.sidebands {
                let k = f64::from(s.order);
                out.gear += s.amplitude * (((z + k) * theta).sin() + ((z - k) * theta).sin());
            }
        }
        if let Some(b) = &self.spec.blade_pass {
            let z = f64::from(b.blades);
            out.blade_pass = b.amplitude * (z * theta).sin();
            for (i, &a) in b.harmonics.iter().enumerate() {
                out.blade_pass += a * ((i + 2) as f64 * z * theta).sin();
            }
        }
        out.bearing = self.bearing_sample(t, f_shaft);
        if self.spec.broadband_rms > 0.0 {
            let g: f64 = self.noise_rng.sample(StandardNormal);
            out.broadband = self.spec.broadband_rms * self.broadband_factor * g;
        }

        let dt_rev = f_shaft / fs;
        self.shaft_rev = (self.shaft_rev + dt_rev).fract();
        self.cage_rev = (self.cage_rev + self.cage_order * dt_rev).fract();
        self.k += 1;
        out
    }

    fn apply_change(&mut self, c: &ChangeSpec) {
        self.changed = true;
        self.harmonic_factor = c.harmonic_factor;
        self.broadband_factor = c.broadband_factor;
        self.spec.harmonics.extend(c.harmonics.iter().cloned());
        if let (Some(d), Some(b)) = (c.defect, self.spec.bearing) {
            self.defect = Some(ActiveDefect::new(d, &b.geometry(), self.sample_rate_hz));
            if self.next_impact_s.is_none() {
                self.next_impact_s = Some(c.at_s);
            }
        }
    }

    /// Starts the impacts due by `t` and sums the responses still ringing.
    fn bearing_sample(&mut self, t: f64, f_shaft: f64) -> f64 {
        if let (Some(d), Some(next)) = (self.defect, self.next_impact_s) {
            let mut next = next;
            while next <= t {
                let amplitude = d.spec.amplitude * self.modulation(&d, next, t, f_shaft);
                // The impact fell between grid instants: start its response at the phase and
                // decay it has reached by `t`, so impacts are not snapped to the grid.
                let lag = t - next;
                let tau_s = d.spec.decay_ms * 1e-3;
                let env = amplitude * (-lag / tau_s).exp();
                let ph = TAU * d.spec.resonance_hz * lag;
                self.ringing.push(Ringing {
                    re: env * ph.cos(),
                    im: env * ph.sin(),
                    rot_re: d.rot_re,
                    rot_im: d.rot_im,
                    left: d.ring_len,
                });
                self.last_impact = Some(Impact {
                    t_s: next,
                    amplitude,
                });
                let period = 1.0 / (d.order * f_shaft);
                let j = if d.spec.jitter > 0.0 {
                    self.impact_rng.random_range(-d.spec.jitter..=d.spec.jitter)
                } else {
                    0.0
                };
                next += period * (1.0 + j);
            }
            self.next_impact_s = Some(next);
        }
        let mut x = 0.0;
        for r in &mut self.ringing {
            x += r.im;
            let (re, im) = (
                r.re * r.rot_re - r.im * r.rot_im,
                r.re * r.rot_im + r.im * r.rot_re,
            );
            r.re = re;
            r.im = im;
            r.left -= 1;
        }
        self.ringing.retain(|r| r.left > 0);
        x
    }

    /// Amplitude factor of an impact at `t_impact`: the load-zone modulation.
    fn modulation(&self, d: &ActiveDefect, t_impact: f64, t: f64, f_shaft: f64) -> f64 {
        // Angles are known at `t`; step them back to the impact (less than one sample).
        let back_rev = (t - t_impact) * f_shaft;
        let angle = match d.spec.kind {
            DefectKind::OuterRace => return 1.0,
            DefectKind::InnerRace => self.shaft_rev - back_rev,
            DefectKind::RollingElement => self.cage_rev - self.cage_order * back_rev,
        };
        1.0 + d.spec.modulation_depth * (TAU * angle).cos()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// An invented generic geometry whose fault frequencies were worked out by hand from the
    /// formulas of Randall 2011 and Randall & Antoni 2011 (from memory) at fr = 29.95 Hz.
    const GEOMETRY: BearingGeometry = BearingGeometry {
        rolling_elements: 9,
        element_diameter_mm: 7.94,
        pitch_diameter_mm: 39.04,
        contact_angle_deg: 0.0,
    };

    fn outer_race_machine(jitter: f64) -> MachineSpec {
        MachineSpec {
            kind: "test".into(),
            shaft_hz: Some(29.95),
            shaft_rpm: None,
            speed_wander: 0.0,
            speed_wander_period_s: 10.0,
            harmonics: vec![],
            gear: None,
            bearing: Some(BearingSpec {
                rolling_elements: 9,
                element_diameter_mm: 7.94,
                pitch_diameter_mm: 39.04,
                contact_angle_deg: 0.0,
                defect: Some(DefectSpec {
                    kind: DefectKind::OuterRace,
                    amplitude: 1.0,
                    resonance_hz: 3000.0,
                    decay_ms: 0.5,
                    jitter,
                    modulation_depth: 0.5,
                }),
            }),
            blade_pass: None,
            broadband_rms: 0.0,
            change: None,
        }
    }

    #[test]
    fn fault_frequencies_match_worked_example() {
        let f = GEOMETRY.fault_frequencies(29.95);
        assert!((f.bpfo_hz - 107.364306).abs() < 1e-6, "{}", f.bpfo_hz);
        assert!((f.bpfi_hz - 162.185694).abs() < 1e-6, "{}", f.bpfi_hz);
        assert!((f.bsf_hz - 70.584594).abs() < 1e-6, "{}", f.bsf_hz);
        assert!((f.ftf_hz - 11.929367).abs() < 1e-6, "{}", f.ftf_hz);
    }

    #[test]
    fn impacts_ring_and_decay() {
        let mut m = MachineSynth::new(&outer_race_machine(0.0), 25_600.0, 1);
        let x: Vec<f64> = (0..25_600).map(|_| m.next_sample().bearing).collect();
        let peak = x.iter().fold(0.0f64, |a, &b| a.max(b.abs()));
        assert!(peak > 0.5 && peak <= 1.0, "peak {peak}");
        assert!(
            m.ringing.len() <= 2,
            "only the last impact or two still ring"
        );
    }

    #[test]
    fn wander_stays_within_bounds() {
        let mut spec = outer_race_machine(0.0);
        spec.speed_wander = 0.005;
        spec.speed_wander_period_s = 0.5;
        let mut m = MachineSynth::new(&spec, 1000.0, 3);
        for _ in 0..20_000 {
            let f = m.shaft_hz();
            assert!((f / 29.95 - 1.0).abs() <= 0.005 + 1e-12);
            m.next_sample();
        }
    }

    #[test]
    fn same_seed_same_signal() {
        let mut spec = outer_race_machine(0.015);
        spec.broadband_rms = 0.1;
        let run = |seed| {
            let mut m = MachineSynth::new(&spec, 25_600.0, seed);
            (0..5000)
                .map(|_| {
                    let s = m.next_sample();
                    s.bearing + s.broadband
                })
                .collect::<Vec<_>>()
        };
        assert_eq!(run(7), run(7));
        assert_ne!(run(7), run(8));
    }
}
