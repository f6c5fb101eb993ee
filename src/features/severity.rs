//! Indicative severity zones A-D from broadband velocity RMS, with a configurable boundary
//! table.
//!
//! The defaults are example class boundaries of ISO 10816-1 Annex B, **from memory of the
//! standard's tables** (the ISO 10816 family, since superseded by ISO 20816, uses the same zone
//! idea): check every figure against the current standard and the machine maker's limits before
//! relying on it. Zones: A newly commissioned, B acceptable long-term, C limited operation,
//! D damage likely. Every output carrying a zone carries [`super::CAUTION`].

use serde::{Deserialize, Serialize};

/// A severity zone.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Serialize, Deserialize)]
pub enum Zone {
    /// No valid velocity (empty band, non-finite value).
    Unknown,
    /// Newly commissioned machines.
    A,
    /// Acceptable for unrestricted long-term operation.
    B,
    /// Limited operation only.
    C,
    /// Damage likely.
    D,
}

impl Zone {
    /// Record-file code: 0 unknown, 1 A, 2 B, 3 C, 4 D.
    pub fn code(self) -> u8 {
        self as u8
    }
}

/// Zone boundaries on velocity RMS, mm/s.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ZoneBoundaries {
    /// A/B boundary.
    pub a_b_mm_s: f64,
    /// B/C boundary.
    pub b_c_mm_s: f64,
    /// C/D boundary.
    pub c_d_mm_s: f64,
}

impl ZoneBoundaries {
    /// The zone of `velocity_rms_mm_s`. A value exactly on a boundary goes to the upper
    /// (worse) zone: the boundary is where the worse zone begins, the cautious reading.
    pub fn classify(&self, velocity_rms_mm_s: f64) -> Zone {
        let v = velocity_rms_mm_s;
        if !v.is_finite() || v < 0.0 {
            Zone::Unknown
        } else if v >= self.c_d_mm_s {
            Zone::D
        } else if v >= self.b_c_mm_s {
            Zone::C
        } else if v >= self.a_b_mm_s {
            Zone::B
        } else {
            Zone::A
        }
    }

    /// True when the boundaries increase strictly.
    pub fn is_ordered(&self) -> bool {
        0.0 < self.a_b_mm_s && self.a_b_mm_s < self.b_c_mm_s && self.b_c_mm_s < self.c_d_mm_s
    }
}

/// A named row of a boundary table.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct BoundaryClass {
    /// Short name of the class or group.
    pub name: &'static str,
    /// What kind of machine it is meant for.
    pub description: &'static str,
    /// Its boundaries.
    pub boundaries: ZoneBoundaries,
}

const fn zb(a_b_mm_s: f64, b_c_mm_s: f64, c_d_mm_s: f64) -> ZoneBoundaries {
    ZoneBoundaries {
        a_b_mm_s,
        b_c_mm_s,
        c_d_mm_s,
    }
}

/// ISO 10816-1 Annex B example classes, mm/s (from memory of the standard's table; indicative).
pub const ISO_10816_1_CLASSES: [BoundaryClass; 4] = [
    BoundaryClass {
        name: "I",
        description: "small machines, up to about 15 kW",
        boundaries: zb(0.71, 1.8, 4.5),
    },
    BoundaryClass {
        name: "II",
        description: "medium machines, 15-75 kW, or up to 300 kW on special foundations",
        boundaries: zb(1.12, 2.8, 7.1),
    },
    BoundaryClass {
        name: "III",
        description: "large machines on rigid foundations",
        boundaries: zb(1.8, 4.5, 11.2),
    },
    BoundaryClass {
        name: "IV",
        description: "large machines on soft foundations",
        boundaries: zb(2.8, 7.1, 18.0),
    },
];

/// ISO 10816-3 groups (industrial machines above 15 kW, 120-15000 r/min), mm/s (from memory of
/// the standard's table; indicative).
pub const ISO_10816_3_GROUPS: [BoundaryClass; 4] = [
    BoundaryClass {
        name: "group1-rigid",
        description: "large machines, 300 kW-50 MW, rigid foundation",
        boundaries: zb(2.3, 4.5, 7.1),
    },
    BoundaryClass {
        name: "group1-flexible",
        description: "large machines, 300 kW-50 MW, flexible foundation",
        boundaries: zb(3.5, 7.1, 11.0),
    },
    BoundaryClass {
        name: "group2-rigid",
        description: "medium machines, 15-300 kW, rigid foundation",
        boundaries: zb(1.4, 2.8, 4.5),
    },
    BoundaryClass {
        name: "group2-flexible",
        description: "medium machines, 15-300 kW, flexible foundation",
        boundaries: zb(2.3, 4.5, 7.1),
    },
];

/// Looks a class or group up by name in both tables.
pub fn boundary_class(name: &str) -> Option<&'static BoundaryClass> {
    ISO_10816_1_CLASSES
        .iter()
        .chain(ISO_10816_3_GROUPS.iter())
        .find(|c| c.name.eq_ignore_ascii_case(name))
}

/// Severity configuration.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct SeverityConfig {
    /// Boundaries used. Default: ISO 10816-1 class II (medium machines, the usual size of the
    /// pumps, motors and fans this gateway watches), from memory of the standard's table.
    pub boundaries: ZoneBoundaries,
}

impl Default for SeverityConfig {
    fn default() -> Self {
        Self {
            boundaries: ISO_10816_1_CLASSES[1].boundaries,
        }
    }
}
