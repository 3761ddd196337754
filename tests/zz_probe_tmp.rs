use mullion::backbone::{random_timm_state_dict, Config};
use mullion::cli::RunArgs;
use mullion::report_cli::{self, ReportArgs};
use std::path::PathBuf;
#[test]
fn probe() {
    let out = PathBuf::from("/tmp/probe_report");
    let _ = std::fs::remove_dir_all(&out);
    std::fs::create_dir_all(&out).unwrap();
    let config = Config { embed_dim: 16, depths: vec![2, 2, 2, 2], heads: vec![1, 2, 4, 8], ..Config::tiny() };
    let sd = random_timm_state_dict(&config, 7).unwrap();
    let weights = out.join("random.safetensors");
    let map: std::collections::HashMap<_, _> = sd.into_iter().collect();
    candle_core::safetensors::save(&map, &weights).unwrap();
    let run = RunArgs { weights, config: None, pad_order: None, small_stage: None, mean: None, std: None, max_memory_gb: 12.0 };
    let mut a = ReportArgs::new(run, PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("sample-data"), out.join("r"));
    a.figures = true;
    let t = std::time::Instant::now();
    report_cli::report(&a).unwrap();
    eprintln!("took {:?}", t.elapsed());
}
