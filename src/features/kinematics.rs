//! Machine kinematics: shaft speed, rolling-element bearing geometry and gear meshes, and the
//! fault frequencies they give (serde configuration types).
//!
//! Formulas: R. B. Randall & J. Antoni, "Rolling element bearing diagnostics: a tutorial",
//! Mech. Syst. Signal Process., 2011; R. B. Randall, "Vibration-based Condition Monitoring",
//! Wiley 2011 (cited from memory). All assume the outer race fixed and no slip; real bearings
//! run 1-2% off these kinematic values, which is why labels use a tolerance.

use serde::{Deserialize, Serialize};

/// How the shaft speed of a block is known.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum ShaftSpeed {
    /// Given, in Hz.
    Hz(f64),
    /// Given, in revolutions per minute.
    Rpm(f64),
    /// Estimated per block as the fundamental of the dominant harmonic family of the direct
    /// spectrum, searched in `[min_hz, max_hz]`.
    Estimate {
        /// Lowest fundamental considered, Hz.
        min_hz: f64,
        /// Highest fundamental considered, Hz.
        max_hz: f64,
    },
}

impl Default for ShaftSpeed {
    fn default() -> Self {
        // 2-200 Hz covers 120-12000 r/min, most pumps, motors, fans and gearbox input shafts.
        ShaftSpeed::Estimate {
            min_hz: 2.0,
            max_hz: 200.0,
        }
    }
}

impl ShaftSpeed {
    /// The given speed in Hz, or `None` when it has to be estimated.
    pub fn given_hz(&self) -> Option<f64> {
        match *self {
            ShaftSpeed::Hz(f) => Some(f),
            ShaftSpeed::Rpm(r) => Some(r / 60.0),
            ShaftSpeed::Estimate { .. } => None,
        }
    }
}

/// Geometry of a rolling-element bearing on the monitored shaft.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct BearingGeometry {
    /// Number of rolling elements `Nb`.
    pub elements: u32,
    /// Rolling-element diameter `d`, mm.
    pub element_diameter_mm: f64,
    /// Pitch diameter `D`, mm.
    pub pitch_diameter_mm: f64,
    /// Contact angle `phi`, degrees (0 for a deep-groove bearing under radial load).
    #[serde(default)]
    pub contact_angle_deg: f64,
}

/// Kinematic fault frequencies of a bearing at one shaft speed, Hz.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct BearingFrequencies {
    /// Ball-pass frequency, outer race: `(Nb/2) fr (1 - (d/D) cos phi)`.
    pub bpfo_hz: f64,
    /// Ball-pass frequency, inner race: `(Nb/2) fr (1 + (d/D) cos phi)`.
    pub bpfi_hz: f64,
    /// Ball spin frequency: `(D/(2d)) fr (1 - ((d/D) cos phi)²)`. A ball defect strikes both
    /// races, so `2 BSF` is often the line seen.
    pub bsf_hz: f64,
    /// Fundamental train (cage) frequency: `(fr/2)(1 - (d/D) cos phi)`.
    pub ftf_hz: f64,
}

impl BearingGeometry {
    /// Fault frequencies at shaft rate `shaft_hz` (Randall & Antoni 2011).
    pub fn frequencies(&self, shaft_hz: f64) -> BearingFrequencies {
        let ratio = self.element_diameter_mm / self.pitch_diameter_mm;
        let rc = ratio * self.contact_angle_deg.to_radians().cos();
        let nb = self.elements as f64;
        BearingFrequencies {
            bpfo_hz: 0.5 * nb * shaft_hz * (1.0 - rc),
            bpfi_hz: 0.5 * nb * shaft_hz * (1.0 + rc),
            bsf_hz: shaft_hz / (2.0 * ratio) * (1.0 - rc * rc),
            ftf_hz: 0.5 * shaft_hz * (1.0 - rc),
        }
    }
}

/// A gear on the monitored shaft, optionally with its mating gear.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct GearMesh {
    /// Teeth `Z1` of the gear on the monitored shaft.
    pub teeth: u32,
    /// Teeth `Z2` of the mating gear, when known.
    #[serde(default)]
    pub mating_teeth: Option<u32>,
}

/// Frequencies of a gear mesh at one shaft speed, Hz.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct GearFrequencies {
    /// Gear-mesh frequency `Z1 f_shaft`.
    pub gmf_hz: f64,
    /// Rate of the mating shaft `f_shaft Z1 / Z2`.
    pub mating_shaft_hz: Option<f64>,
    /// Hunting-tooth frequency `GMF gcd(Z1, Z2) / (Z1 Z2)`.
    pub hunting_tooth_hz: Option<f64>,
}

impl GearMesh {
    /// Mesh frequencies at shaft rate `shaft_hz` (Randall 2011). Sidebands of a fault on this
    /// gear sit at `GMF ± k f_shaft`.
    pub fn frequencies(&self, shaft_hz: f64) -> GearFrequencies {
        let gmf = self.teeth as f64 * shaft_hz;
        let (mating, hunting) = match self.mating_teeth {
            Some(z2) if z2 > 0 => {
                let g = gcd(self.teeth, z2) as f64;
                (
                    Some(shaft_hz * self.teeth as f64 / z2 as f64),
                    Some(gmf * g / (self.teeth as f64 * z2 as f64)),
                )
            }
            _ => (None, None),
        };
        GearFrequencies {
            gmf_hz: gmf,
            mating_shaft_hz: mating,
            hunting_tooth_hz: hunting,
        }
    }
}

fn gcd(mut a: u32, mut b: u32) -> u32 {
    while b != 0 {
        (a, b) = (b, a % b);
    }
    a
}

/// What is known of the machine behind one stream.
#[derive(Debug, Clone, PartialEq, Default, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct Kinematics {
    /// Shaft speed, given or estimated.
    pub shaft: ShaftSpeed,
    /// Bearings on the shaft.
    pub bearings: Vec<BearingGeometry>,
    /// Gears on the shaft.
    pub gears: Vec<GearMesh>,
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn rpm_converts_to_hz() {
        assert_eq!(ShaftSpeed::Rpm(1797.0).given_hz(), Some(29.95));
        assert_eq!(gcd(23, 61), 1);
        assert_eq!(gcd(24, 36), 12);
    }
}
