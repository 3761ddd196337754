//! One file per panel. Each panel is a struct holding only its own widget state, with a `ui`
//! that draws from the [`Workbench`](super::state::Workbench) it is given (read only) and returns
//! the [`Action`](super::actions::Action)s the window applies after the frame.

pub mod controls;
pub mod drift;
pub mod help;
pub mod keys;
pub mod lens;
pub mod load_report;
pub mod messages;
pub mod pointer;
pub mod profiles;
pub mod readout;
pub mod region_panel;
pub mod region_table;
pub mod sources;
pub mod strip;
pub mod window_question;
