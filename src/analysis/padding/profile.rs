//! Profiles of a scalar map against the window layout: the mean value per position inside the
//! window (`wh x ww` bins, one profile per block kind: regular or shifted windows), and the mean
//! against the distance in tokens to the padded border. Padding is always appended at the
//! bottom and the right, so a token's distance to it is `min(rows - 1 - row, cols - 1 - col)`
//! (0 on the last row or column). Seams show as edges in the first, border effects as a slope
//! near 0 in the second.

use crate::engine::geometry::BlockGeometry;
use crate::error::{Error, Result};

/// One bin of a profile: its mean over the tokens in it.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct ProfileBin {
    /// Window position (row, col) for a window profile; (distance, 0) for a border profile.
    pub at: (usize, usize),
    pub mean: f64,
    pub tokens: usize,
}

fn check(values: &[f32], rows: usize, cols: usize) -> Result<()> {
    if values.len() != rows * cols {
        return Err(Error::Internal(format!(
            "{} map values for a {rows}x{cols} grid",
            values.len()
        )));
    }
    Ok(())
}

/// Mean of `values` (row-major over the block's grid) per position inside the block's window,
/// row-major over the `wh x ww` positions; positions no real token occupies are left out.
/// Positions are those of the rolled map the block attends over, so a shifted block's profile
/// shows where its own windows cut the grid.
pub fn window_profile(values: &[f32], block: &BlockGeometry) -> Result<Vec<ProfileBin>> {
    let (rows, cols) = (block.rows.len, block.cols.len);
    check(values, rows, cols)?;
    let (wh, ww) = block.window();
    let mut sum = vec![0f64; wh * ww];
    let mut n = vec![0usize; wh * ww];
    for r in 0..rows {
        for c in 0..cols {
            let (_, pos) = block.window_of(r, c);
            sum[pos] += values[r * cols + c] as f64;
            n[pos] += 1;
        }
    }
    Ok((0..wh * ww)
        .filter(|&p| n[p] > 0)
        .map(|p| ProfileBin {
            at: (p / ww, p % ww),
            mean: sum[p] / n[p] as f64,
            tokens: n[p],
        })
        .collect())
}

/// Mean of `values` (row-major, `rows x cols`) per distance in tokens to the bottom/right
/// border where padding starts, nearest first.
pub fn border_profile(values: &[f32], rows: usize, cols: usize) -> Result<Vec<ProfileBin>> {
    check(values, rows, cols)?;
    let far = rows.min(cols);
    let mut sum = vec![0f64; far];
    let mut n = vec![0usize; far];
    for r in 0..rows {
        for c in 0..cols {
            let d = (rows - 1 - r).min(cols - 1 - c);
            sum[d] += values[r * cols + c] as f64;
            n[d] += 1;
        }
    }
    Ok((0..far)
        .map(|d| ProfileBin {
            at: (d, 0),
            mean: sum[d] / n[d] as f64,
            tokens: n[d],
        })
        .collect())
}

/// A block's window size and its window-position profile.
pub type WindowProfile = ((usize, usize), Vec<ProfileBin>);

/// One stage's profiles of a map: the window-position profiles of its first regular and first
/// shifted block, and the border profile.
#[derive(Clone, Debug, PartialEq)]
pub struct StageProfiles {
    pub regular: Option<WindowProfile>,
    pub shifted: Option<WindowProfile>,
    pub border: Vec<ProfileBin>,
}

/// The profiles of `values` (row-major over the stage grid) for stage `sg`.
pub fn stage_profiles(
    values: &[f32],
    sg: &crate::engine::geometry::StageGeometry,
) -> Result<StageProfiles> {
    let of = |shifted: bool| -> Result<Option<WindowProfile>> {
        sg.blocks
            .iter()
            .find(|b| b.is_shifted() == shifted)
            .map(|b| Ok((b.window(), window_profile(values, b)?)))
            .transpose()
    };
    Ok(StageProfiles {
        regular: of(false)?,
        shifted: of(true)?,
        border: border_profile(values, sg.grid.0, sg.grid.1)?,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::geometry::{AxisPlan, PadOrder};

    #[test]
    fn border_distance_by_hand() {
        // 2x3 grid: distances [[1,1,0],[0,0,0]] -> d=0: values 2,3,4,5 (mean 3.5); d=1: 0,1.
        let v = [0., 1., 2., 3., 4., 5.];
        let p = border_profile(&v, 2, 3).unwrap();
        assert_eq!(p.len(), 2);
        assert_eq!((p[0].mean, p[0].tokens), (3.5, 4));
        assert_eq!((p[1].mean, p[1].tokens), (0.5, 2));
    }

    #[test]
    fn window_positions_by_hand() {
        // One row of 4 tokens, windows of 2, no shift: positions 0 get tokens 0 and 2.
        let b = BlockGeometry {
            rows: AxisPlan::new(1, 1, 0, PadOrder::PadThenShift),
            cols: AxisPlan::new(4, 2, 0, PadOrder::PadThenShift),
        };
        let p = window_profile(&[1., 2., 3., 4.], &b).unwrap();
        assert_eq!(p.len(), 2);
        assert_eq!((p[0].at, p[0].mean), ((0, 0), 2.0));
        assert_eq!((p[1].at, p[1].mean), ((0, 1), 3.0));
        // Shifted by 1 with shift-then-pad: token 1 goes to slot 0, token 0 to slot 3.
        let s = BlockGeometry {
            rows: AxisPlan::new(1, 1, 0, PadOrder::ShiftThenPad),
            cols: AxisPlan::new(4, 2, 1, PadOrder::ShiftThenPad),
        };
        let p = window_profile(&[1., 2., 3., 4.], &s).unwrap();
        // slots: 0<-t1, 1<-t2, 2<-t3, 3<-t0 -> position 0: t1, t3 (2+4)/2; position 1: t2, t0.
        assert_eq!((p[0].mean, p[1].mean), (3.0, 2.0));
    }
}
