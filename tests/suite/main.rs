//! The integration suite, one test binary so it links once. Each module drives one part of
//! Mullion the way a user or a script would; `common` holds what they share.

mod common;

mod architecture;
mod bad_input;
mod commands;
mod compare;
mod compare_window;
mod demo;
mod families;
mod hardening;
mod inspector;
mod kit;
mod padding;
mod padding_window;
mod real_window;
mod reference_outputs;
mod regions;
mod render;
mod responsive;
mod window;
mod worker;
