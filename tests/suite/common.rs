//! Helpers every test module shares: running the `mullion` binary, and paths to the bundled
//! sample data and the committed reference fixtures.

use std::path::{Path, PathBuf};
use std::process::Command;

/// What one run of the binary gave.
pub struct Run {
    /// Exit status (-1 when killed by a signal).
    pub code: i32,
    pub stdout: String,
    pub stderr: String,
}

impl Run {
    pub fn ok(&self) -> bool {
        self.code == 0
    }
}

/// Run `mullion` with `args` and wait for it.
pub fn mullion(args: &[&str]) -> Run {
    let out = Command::new(env!("CARGO_BIN_EXE_mullion"))
        .args(args)
        .output()
        .expect("the mullion binary runs");
    Run {
        code: out.status.code().unwrap_or(-1),
        stdout: String::from_utf8_lossy(&out.stdout).into_owned(),
        stderr: String::from_utf8_lossy(&out.stderr).into_owned(),
    }
}

/// The repository root.
pub fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

/// The bundled demo folder.
pub fn sample_data() -> PathBuf {
    root().join("sample-data")
}

/// A file of the bundled demo folder.
pub fn sample(name: &str) -> PathBuf {
    sample_data().join(name)
}

/// The committed reference fixtures.
pub fn fixtures() -> PathBuf {
    root().join("tests/fixtures")
}

/// `max |got - want| / max |want|`, in f64.
pub fn rel_diff_f64(got: &candle_core::Tensor, want: &candle_core::Tensor) -> f64 {
    let max_abs = |t: &candle_core::Tensor| {
        t.to_dtype(candle_core::DType::F64)
            .unwrap()
            .abs()
            .unwrap()
            .flatten_all()
            .unwrap()
            .max(0)
            .unwrap()
            .to_scalar::<f64>()
            .unwrap()
    };
    let d = (got.to_dtype(candle_core::DType::F64).unwrap()
        - want.to_dtype(candle_core::DType::F64).unwrap())
    .unwrap();
    max_abs(&d) / max_abs(want).max(f64::MIN_POSITIVE)
}

/// A CSV file as rows of column name -> text.
pub fn read_csv(path: &Path) -> Vec<std::collections::BTreeMap<String, String>> {
    let mut r = csv::Reader::from_path(path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    let headers: Vec<String> = r.headers().unwrap().iter().map(String::from).collect();
    r.records()
        .map(|rec| {
            headers
                .iter()
                .cloned()
                .zip(rec.unwrap().iter().map(String::from))
                .collect()
        })
        .collect()
}

/// Column `key` of a CSV row as a number.
pub fn num(row: &std::collections::BTreeMap<String, String>, key: &str) -> f64 {
    row[key]
        .parse()
        .unwrap_or_else(|_| panic!("{key} = '{}'", row[key]))
}

/// Held by the tests that take the whole machine (a Swin-B pass on a large image) and by those
/// that wait on a real window with a deadline, so that the two never overlap on a 2-core runner.
pub fn machine_to_myself() -> std::sync::MutexGuard<'static, ()> {
    static LOCK: std::sync::Mutex<()> = std::sync::Mutex::new(());
    LOCK.lock().unwrap_or_else(|e| e.into_inner())
}
