//! Colour maps for scalar maps: the published perceptually uniform tables, looked up with linear
//! interpolation between their 256 entries.

use super::colormap_data::{CIVIDIS, MAGMA, VIRIDIS};
use crate::error::{Error, Result};

/// A colour map of 256 published entries.
#[derive(
    Clone, Copy, Debug, Default, PartialEq, Eq, Hash, serde::Serialize, serde::Deserialize,
)]
#[serde(rename_all = "lowercase")]
pub enum Colormap {
    #[default]
    Viridis,
    Magma,
    /// Designed to read the same for the common colour vision deficiencies.
    Cividis,
}

impl Colormap {
    /// Every colour map, in menu order.
    pub const ALL: [Colormap; 3] = [Colormap::Viridis, Colormap::Magma, Colormap::Cividis];

    /// Lower-case name, as the command line spells it.
    pub fn name(self) -> &'static str {
        match self {
            Colormap::Viridis => "viridis",
            Colormap::Magma => "magma",
            Colormap::Cividis => "cividis",
        }
    }

    /// A colour map from its name.
    pub fn parse(s: &str) -> Result<Colormap> {
        Colormap::ALL
            .into_iter()
            .find(|c| c.name().eq_ignore_ascii_case(s.trim()))
            .ok_or_else(|| {
                Error::BadArgument(format!(
                    "colour map '{s}': expected viridis, magma or cividis"
                ))
            })
    }

    /// The published table.
    pub fn table(self) -> &'static [[f32; 3]; 256] {
        match self {
            Colormap::Viridis => &VIRIDIS,
            Colormap::Magma => &MAGMA,
            Colormap::Cividis => &CIVIDIS,
        }
    }

    /// The colour at `t` in [0, 1] (clamped; NaN gives the low end): entry `t * 255`,
    /// interpolated linearly between the two nearest entries.
    pub fn lookup(self, t: f32) -> [f32; 3] {
        let table = self.table();
        let x = if t.is_nan() {
            0.0
        } else {
            t.clamp(0.0, 1.0) * 255.0
        };
        let i = (x.floor() as usize).min(254);
        let f = x - i as f32;
        let (a, b) = (table[i], table[i + 1]);
        [
            a[0] + (b[0] - a[0]) * f,
            a[1] + (b[1] - a[1]) * f,
            a[2] + (b[2] - a[2]) * f,
        ]
    }

    /// [`Self::lookup`] as 8-bit RGB (rounded).
    pub fn lookup_u8(self, t: f32) -> [u8; 3] {
        let c = self.lookup(t);
        c.map(|v| (v * 255.0).round().clamp(0.0, 255.0) as u8)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn close(a: [f32; 3], b: [f32; 3]) -> bool {
        a.iter().zip(&b).all(|(x, y)| (x - y).abs() < 1e-6)
    }

    // Values checked against matplotlib 3.11.2 `_cm_listed.py` (_viridis_data, _magma_data,
    // _cividis_data): first, middle (index 128) and last entries.
    #[test]
    fn published_entries() {
        assert!(close(
            Colormap::Viridis.lookup(0.0),
            [0.267004, 0.004874, 0.329415]
        ));
        assert!(close(
            Colormap::Viridis.lookup(1.0),
            [0.993248, 0.906157, 0.143936]
        ));
        assert!(close(
            Colormap::Viridis.lookup(128.0 / 255.0),
            [0.127568, 0.566949, 0.550556]
        ));
        assert!(close(
            Colormap::Magma.lookup(0.0),
            [0.001462, 0.000466, 0.013866]
        ));
        assert!(close(
            Colormap::Magma.lookup(1.0),
            [0.987053, 0.991438, 0.749504]
        ));
        assert!(close(
            Colormap::Cividis.lookup(0.0),
            [0.0, 0.135112, 0.304751]
        ));
        assert!(close(
            Colormap::Cividis.lookup(1.0),
            [0.995737, 0.909344, 0.217772]
        ));
    }

    #[test]
    fn interpolates_between_entries_and_clamps() {
        let t = VIRIDIS;
        let mid = Colormap::Viridis.lookup(0.5 / 255.0);
        for k in 0..3 {
            assert!((mid[k] - (t[0][k] + t[1][k]) / 2.0).abs() < 1e-6);
        }
        assert_eq!(
            Colormap::Viridis.lookup(-3.0),
            Colormap::Viridis.lookup(0.0)
        );
        assert_eq!(Colormap::Viridis.lookup(7.0), Colormap::Viridis.lookup(1.0));
        assert_eq!(
            Colormap::Viridis.lookup(f32::NAN),
            Colormap::Viridis.lookup(0.0)
        );
        assert_eq!(Colormap::parse("Magma").unwrap(), Colormap::Magma);
        assert!(Colormap::parse("rainbow").is_err());
    }
}
