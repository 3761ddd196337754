//! `mullion padding`: how one image's features depend on padding and window seams — the
//! padding sweep, the pad-order disagreement, attention on padding, profiles and size advice.

use super::options::{parse_pads, Pads, RunArgs};
use crate::error::{Error, Result};
use crate::headless::padding::{run_padding, PaddingOptions, DEFAULT_PADS};
use clap::Args;
use std::path::PathBuf;

#[derive(Args, Debug)]
pub struct PaddingArgs {
    #[command(flatten)]
    pub run: RunArgs,
    /// Image file.
    #[arg(long, value_name = "FILE")]
    pub image: PathBuf,
    /// Folder for sweep.csv, orders.csv, pad_attention.csv, profile.csv, sizes.txt (and figures/).
    #[arg(long, value_name = "DIR")]
    pub out: PathBuf,
    /// Extra zero rows (bottom) and columns (right) to study, in pixels, comma-separated
    /// [default: 0,8,16,32].
    #[arg(long, value_parser = parse_pads, value_name = "P,P,...")]
    pub pads: Option<Pads>,
    /// Also save a figure of every map in OUT/figures/.
    #[arg(long)]
    pub figures: bool,
}

pub fn run(args: &PaddingArgs) -> Result<()> {
    let opts = PaddingOptions {
        session: args.run.session_options()?,
        image: args.image.clone(),
        out: args.out.clone(),
        pads: args
            .pads
            .as_ref()
            .map_or_else(|| DEFAULT_PADS.to_vec(), |p| p.0.clone()),
        figures: args.figures,
    };
    let o = run_padding(&opts)?;
    for f in &o.files {
        eprintln!("wrote {}", f.display());
    }
    if !o.skipped.is_empty() {
        let pads: Vec<String> = o.skipped.iter().map(|(p, _)| p.to_string()).collect();
        return Err(Error::bad_file(
            &args.image,
            format!(
                "the padded pass for {} px could not run ({}); its sweep rows are left empty, \
                 everything else is written",
                pads.join(", "),
                o.skipped[0].1
            ),
        ));
    }
    Ok(())
}
