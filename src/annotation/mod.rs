//! What the user marks on an image: shapes and their exact clipping, the sidecar file that keeps
//! regions, labels and pinned notes next to the image, undo history and the label palette.
//!
//! Depends on the foundation (`error`, `io`) only; the engine and everything above may use it.

pub mod history;
pub mod palette;
pub mod shape;
pub mod sidecar;

pub use history::Edits;
pub use palette::{colour_name, PALETTE, PALETTE_NAMES, PIN_COLOUR};
pub use shape::{clip_ring, ring_crosses_itself, shoelace, Rect, Shape};
pub use sidecar::{
    load, load_with_warnings, move_aside, read_bytes, save, sidecar_path, to_json, validate,
    LabelDef, Pin, Region, Sidecar, MAX_SIDECAR_BYTES, SCHEMA, SIDECAR_SUFFIX, VERSION,
};
