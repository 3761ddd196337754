//! The caution every exported figure, report, model card and help text carries: one sentence,
//! one home.

/// Response maps can mislead; this sentence goes wherever they leave the program.
pub const CAUTION: &str = "Response maps show where features are large, not why the model \
decides; they are no evidence of safety for high-stakes use, where local rules and qualified \
review come first.";
