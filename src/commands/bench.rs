//! `mullion bench`: time forward passes of a published model size with random weights, or of
//! the user's own checkpoint, on the threads `--threads` asks for; prints GFLOP/s beside a
//! measured matrix-multiply ceiling. The last line is the contract
//! `median_ms=<float> peak_rss_mb=<float>`.

use super::options::{parse_size, PresetArg};
use crate::engine::input::DEFAULT_MEMORY_LIMIT;
use crate::engine::{Backbone, ForwardOptions, RunControl};
use crate::error::Result;
use candle_core::Tensor;
use clap::Args;

#[derive(Args, Debug)]
pub struct BenchArgs {
    /// Published model size: tiny, small, base, large (or T, S, B, L).
    #[arg(long, value_enum, default_value = "tiny")]
    pub preset: PresetArg,
    /// Square input side in pixels (or HxW).
    #[arg(long, default_value = "224", value_parser = parse_size, value_name = "N|HxW")]
    pub size: (usize, usize),
    /// Time this checkpoint instead of a preset with random weights.
    #[arg(long, value_name = "FILE", conflicts_with = "preset")]
    pub weights: Option<std::path::PathBuf>,
    /// Timed runs after one warm-up (1 to 10000).
    #[arg(long, default_value_t = 10, value_parser = clap::value_parser!(u16).range(1..=10000))]
    pub runs: u16,
}

/// Peak resident memory of this process in MB (Linux; 0 elsewhere).
pub fn peak_rss_mb() -> f64 {
    std::fs::read_to_string("/proc/self/status")
        .ok()
        .and_then(|s| {
            s.lines()
                .find(|l| l.starts_with("VmHWM:"))
                .and_then(|l| l.split_whitespace().nth(1))
                .and_then(|kb| kb.parse::<f64>().ok())
        })
        .map_or(0.0, |kb| kb / 1024.0)
}

/// The median of a non-empty list of times.
fn median(times: &mut [f64]) -> f64 {
    times.sort_by(f64::total_cmp);
    let n = times.len();
    if n % 2 == 1 {
        times[n / 2]
    } else {
        (times[n / 2 - 1] + times[n / 2]) / 2.0
    }
}

/// Side of the square matrix product that measures the ceiling (about 2 GFLOP: milliseconds).
const PROBE_SIZE: usize = 1024;

pub fn run(args: &BenchArgs) -> Result<()> {
    let threads = rayon::current_num_threads();
    let (h, w) = args.size;
    let (model, what) = match &args.weights {
        Some(path) => (
            crate::engine::open_checkpoint(path, None)?.model,
            format!("checkpoint {}", crate::io::file_name(path)),
        ),
        None => (
            Backbone::random(args.preset.config(), 0)?,
            format!("preset {}, random weights", args.preset.name()),
        ),
    };
    let config = model.config.clone();
    let semantics = model.default_semantics;
    model.check_memory((h, w), None, DEFAULT_MEMORY_LIMIT)?;
    let x = Tensor::randn(0f32, 1f32, (3, h, w), &candle_core::Device::Cpu)?;
    let opts = ForwardOptions::default();
    let ctl = RunControl::default();
    model.forward(&x, &opts, &ctl)?; // warm-up
    let mut times = Vec::with_capacity(args.runs as usize);
    for _ in 0..args.runs {
        let t = std::time::Instant::now();
        model.forward(&x, &opts, &ctl)?;
        times.push(t.elapsed().as_secs_f64() * 1e3);
    }
    let median = median(&mut times);
    let gmac = config.multiply_adds((h, w), semantics, None) as f64 / 1e9;
    let gflops = 2.0 * gmac / (median / 1e3);
    println!(
        "{what} at {h}x{w}, {threads} thread(s), {} runs: min {:.1} ms, max {:.1} ms, \
         {:.1} GMAC ({gflops:.1} GFLOP/s)",
        args.runs,
        times[0],
        times[times.len() - 1],
        gmac,
    );
    // The ceiling: a short single-precision matrix product on the same pool, best of a few.
    let ceiling = crate::engine::kernels::sgemm_probe(PROBE_SIZE, 5);
    println!(
        "matrix-multiply ceiling ({PROBE_SIZE}^3 sgemm, best of 5): {ceiling:.1} GFLOP/s; the \
         forward pass reaches {:.0}% of it",
        100.0 * gflops / ceiling
    );
    println!("median_ms={median:.3} peak_rss_mb={:.1}", peak_rss_mb());
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn median_of_odd_and_even_lists() {
        assert_eq!(median(&mut [3.0, 1.0, 2.0]), 2.0);
        assert_eq!(median(&mut [4.0, 1.0, 2.0, 3.0]), 2.5);
    }
}
