//! The bundled demo, invented by this project: seedling-tray images drawn from a seed, their
//! cell labels as region sidecars, and the training of the small demo checkpoint.
//!
//! Depends on the engine and on annotation only (and the foundation); nothing in the engine,
//! annotation or analysis depends on it.

pub mod sidecars;
pub mod train;
pub mod tray;

use crate::error::Result;
use std::path::{Path, PathBuf};

/// Write the whole sample set into `dir`: every tray image, its cell labels and the region
/// sidecar made from them. Returns the written paths, sorted.
pub fn write_sample_data(dir: &Path) -> Result<Vec<PathBuf>> {
    let mut written = tray::write_sample_set(dir)?;
    written.extend(sidecars::write_sidecars_from_cells(dir)?);
    written.sort();
    Ok(written)
}
