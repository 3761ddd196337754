//! What the panels ask for. A panel draws from the state it is given and returns actions; the
//! window applies them to the [`crate::app::state::Workbench`] at the end of the frame, so no
//! panel changes anything outside itself while it draws.

use super::settings::Settings;
use crate::annotation::Shape;
use std::path::PathBuf;

/// Which native file dialog to open.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Pick {
    Images,
    Folder,
    Weights,
    /// A checkpoint for the base slot (A).
    Base,
}

/// A change to the current image's regions, labels or pins.
#[derive(Clone, Debug, PartialEq)]
pub enum RegionEdit {
    /// A new region with the label chosen for new regions.
    Add(Shape),
    /// A region's new shape after a move, resize or vertex drag.
    Reshape {
        id: u64,
        shape: Shape,
    },
    Remove(u64),
    Relabel {
        id: u64,
        label: String,
    },
    /// The note of a region; consecutive note edits of one region are one undo step.
    Note {
        id: u64,
        note: String,
    },
    AddPin {
        at: [f64; 2],
        text: String,
    },
    /// Define a label (and make it the one new regions get).
    DefineLabel(String),
    Recolour {
        label: String,
        colour: [u8; 3],
    },
}

#[must_use]
#[derive(Clone, Debug, PartialEq)]
pub enum Action {
    /// Images, folders or checkpoints, routed by their file ending.
    OpenPaths(Vec<PathBuf>),
    /// A path typed by the user (checked to exist first).
    OpenTyped(String),
    /// A checkpoint for the base slot (A), the one the checkpoint on screen is compared with.
    OpenBase(PathBuf),
    /// Open a checkpoint again with the window the user typed in (Swin V2 files do not record
    /// it); `trained`: the window it was pretrained at, 0 for the same.
    OpenWithWindow {
        path: PathBuf,
        /// Into the base slot (A) rather than the checkpoint's.
        base: bool,
        window: usize,
        trained: usize,
    },
    /// Leave the window question unanswered.
    DismissWindowQuestion,
    /// A typed path for the base slot.
    OpenTypedBase(String),
    /// Leave the comparison: close the base checkpoint.
    CloseBase,
    ShowDrift(bool),
    /// The seams and border window (profiles of the lens stage).
    ShowProfiles(bool),
    Pick(Pick),
    NextImage,
    PreviousImage,
    /// Every setting at once, as a panel edited them; the state works out what changed.
    SetSettings(Box<Settings>),
    FocusStage(usize),
    /// The attention inspector's query: a token of a stage grid.
    InspectToken {
        stage: usize,
        row: usize,
        col: usize,
    },
    ClearInspect,
    /// Run the current image again (after a cancel or a failure).
    Rerun,
    CancelRun,
    SaveFigure,
    /// The region statistics table as CSV.
    SaveTable,
    ToggleHelp,
    ShowLoadReport(bool),
    ClearMessages,
    Region(RegionEdit),
    SelectRegion(Option<u64>),
    /// The label new regions get.
    ChooseLabel(String),
    /// Where region files are kept (empty: next to each image); applies to the next image.
    SetSidecarFolder(String),
    Undo,
    Redo,
}
