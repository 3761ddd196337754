//! Padding studies: how a stage's tokens depend on the zero padding the model adds and on where
//! the window seams fall. None of these numbers says whether a prediction is right; they say
//! where features move when only padding, pad order or window position changes.
//!
//! - [`sweep`]: the same image with `p` more zero rows and columns (bottom/right, after
//!   normalisation), compared token by token over the unpadded grid; the *padding sensitivity*
//!   map kind (`padding:P`).
//! - [`orders`]: pad-then-shift against shift-then-pad, the small-stage rule kept; the
//!   *pad-order disagreement* map kind (`pad-order`).
//! - [`attention`]: the share of each query token's attention that falls on padding keys, per
//!   block; the *attention on padding* map kind (`pad-attention:B`).
//! - [`profile`]: a map's mean per position inside the window and against the distance to the
//!   padded border.
//! - [`sizes`]: the padding every stage gets at a size, and the nearest sizes that need none.
//!
//! # Kinds that need another pass
//!
//! The padding kinds compare the image's own forward pass with a second pass of the *same*
//! checkpoint, changed in one way ([`Variant`]): a padded input, the other pad order, or the
//! same pass keeping every block's attention. A kind says which with [`MapKind::variant`];
//! whoever prepares maps runs [`run_variant`] once and hands its output to
//! [`MapKind::compute_pair`] as the second pass (exactly as the difference map gets checkpoint
//! B's pass). [`crate::analysis::prepare_stage_pair`] refuses such a kind without its pass.

pub mod attention;
pub mod orders;
pub mod profile;
pub mod sizes;
pub mod sweep;

pub use attention::{
    all_attention_bytes, pad_attention_shares, pad_attention_stats, AttentionOnPadding,
    PadShareStats,
};
pub use orders::{order_disagreement, OrderDisagreement, OrderStats, ORDER_THRESHOLD};
pub use profile::{border_profile, stage_profiles, window_profile, ProfileBin, StageProfiles};
pub use sizes::{size_advice, SizeAdvice, StagePadding};
pub use sweep::{pad_input, sweep_cosines, PaddingSensitivity, MAX_PAD_PX};

/// The caution the padding studies carry wherever they leave the program.
pub const PADDING_CAUTION: &str = "These maps show how features depend on padding and \
windows, not whether a prediction is right.";

pub use crate::analysis::map::Variant;

use crate::analysis::map::MapKind;
use crate::engine::geometry::{PadOrder, Semantics};
use crate::engine::{Backbone, ForwardOptions, RunControl, StageOutputs};
use crate::error::Result;
use candle_core::Tensor;

/// The other pad order.
pub fn other_order(order: PadOrder) -> PadOrder {
    match order {
        PadOrder::PadThenShift => PadOrder::ShiftThenPad,
        PadOrder::ShiftThenPad => PadOrder::PadThenShift,
    }
}

/// The options of the second pass: `semantics` are the first pass's.
pub fn variant_options(variant: Variant, semantics: Semantics) -> ForwardOptions {
    let mut sem = semantics;
    if variant == Variant::OtherPadOrder {
        sem.pad_order = other_order(sem.pad_order);
    }
    ForwardOptions {
        semantics: Some(sem),
        attention_all: variant == Variant::Attention,
        ..ForwardOptions::default()
    }
}

/// The input of the second pass: `x` (`[chans, H, W]`, normalised) as it is or padded.
pub fn variant_input(variant: Variant, x: &Tensor) -> Result<Tensor> {
    match variant {
        Variant::PaddedInput { rows, cols } => pad_input(x, rows, cols),
        _ => Ok(x.clone()),
    }
}

/// Run the second pass of `variant` for the normalised input `x` whose first pass ran under
/// `semantics`.
pub fn run_variant(
    model: &Backbone,
    x: &Tensor,
    semantics: Semantics,
    variant: Variant,
) -> Result<StageOutputs> {
    model.forward(
        &variant_input(variant, x)?,
        &variant_options(variant, semantics),
        &RunControl::default(),
    )
}

/// The kinds of this room by command-line name: `padding:P`, `pad-order`, `pad-attention:B`.
pub fn parse_padding_kind(s: &str) -> Option<Result<Box<dyn MapKind>>> {
    let num = |v: &str, what: &str| {
        v.trim().parse::<usize>().map_err(|_| {
            crate::error::Error::BadArgument(format!(
                "'{s}': {what} must be a non-negative whole number"
            ))
        })
    };
    if s == "pad-order" {
        return Some(Ok(Box::new(OrderDisagreement)));
    }
    if let Some(p) = s.strip_prefix("padding:") {
        return Some(
            num(p, "the padding in pixels")
                .and_then(PaddingSensitivity::new)
                .map(|k| Box::new(k) as Box<dyn MapKind>),
        );
    }
    if let Some(b) = s.strip_prefix("pad-attention:") {
        return Some(
            num(b, "the block").map(|b| Box::new(AttentionOnPadding(b)) as Box<dyn MapKind>),
        );
    }
    None
}
