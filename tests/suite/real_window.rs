//! The real window under Xvfb: start the binary on the bundled demo, wait until it says the
//! maps are drawn, take a screenshot of the X screen and check that the image and every stage
//! panel are there (not a blank or single-colour window).
//!
//! Needs Xvfb and ImageMagick's `import` (`.ci/run` installs them). Without them the test says
//! so and passes, unless MULLION_REQUIRE_XVFB=1 (set by `.ci/run`), where it fails.

use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

fn have(tool: &str) -> bool {
    Command::new("sh")
        .arg("-c")
        .arg(format!("command -v {tool}"))
        .stdout(Stdio::null())
        .status()
        .is_ok_and(|s| s.success())
}

struct Kill(std::process::Child);
impl Drop for Kill {
    fn drop(&mut self) {
        let _ = self.0.kill();
        let _ = self.0.wait();
    }
}

/// Open the real window under Xvfb on a `screen` (WxHxD) with `args`, wait until its maps are
/// drawn and take a screenshot saved as `target/smoke/<name>`; `None` when Xvfb is missing and
/// not required.
fn screenshot(
    screen: &str,
    args: &[&str],
    name: &str,
    display_offset: u32,
) -> Option<image::RgbImage> {
    if !(have("Xvfb") && have("import")) {
        assert!(
            std::env::var("MULLION_REQUIRE_XVFB").as_deref() != Ok("1"),
            "Xvfb and ImageMagick's import are required here (MULLION_REQUIRE_XVFB=1)"
        );
        eprintln!("skipped: Xvfb or import not installed (run .ci/run to install them)");
        return None;
    }
    let _machine = crate::common::machine_to_myself();
    let display = format!(":{}", 90 + display_offset + 2 * (std::process::id() % 40));
    let _x = Kill(
        Command::new("Xvfb")
            .args([display.as_str(), "-screen", "0", screen, "-nolisten", "tcp"])
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .expect("start Xvfb"),
    );
    std::thread::sleep(Duration::from_millis(800));

    let out_dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("target/smoke");
    std::fs::create_dir_all(&out_dir).unwrap();
    let ready = out_dir.join(format!("{name}.ready"));
    let _ = std::fs::remove_file(&ready);
    let runtime = tempfile::tempdir().unwrap();
    let config = tempfile::tempdir().unwrap();
    let _app = Kill(
        Command::new(env!("CARGO_BIN_EXE_mullion"))
            .args(args)
            .env("DISPLAY", &display)
            .env("XDG_RUNTIME_DIR", runtime.path())
            .env("XDG_CONFIG_HOME", config.path())
            .env("XDG_DATA_HOME", config.path())
            .env("MULLION_READY_FILE", &ready)
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .expect("start mullion"),
    );
    let start = Instant::now();
    while !ready.exists() {
        assert!(
            start.elapsed() < Duration::from_secs(120),
            "the window did not draw its maps within 120 s"
        );
        std::thread::sleep(Duration::from_millis(200));
    }
    std::thread::sleep(Duration::from_millis(1500));
    let shot: PathBuf = out_dir.join(name);
    let status = Command::new("import")
        .args(["-display", &display, "-window", "root"])
        .arg(&shot)
        .status()
        .unwrap();
    assert!(status.success(), "screenshot failed");
    println!("screenshot: {}", shot.display());
    eprintln!("screenshot: {}", shot.display());

    Some(image::open(&shot).unwrap().to_rgb8())
}

/// Standard deviation of the grey level over a rectangle (fractions of the width and height).
fn spread(img: &image::RgbImage, x: (f32, f32), y: (f32, f32)) -> f64 {
    let (w, h) = img.dimensions();
    let (x0, x1) = ((x.0 * w as f32) as u32, (x.1 * w as f32) as u32);
    let (y0, y1) = ((y.0 * h as f32) as u32, (y.1 * h as f32) as u32);
    let (mut n, mut s, mut s2) = (0f64, 0f64, 0f64);
    for yy in y0..y1 {
        for xx in x0..x1 {
            let p = img.get_pixel(xx, yy);
            let v = (p[0] as f64 + p[1] as f64 + p[2] as f64) / 3.0;
            s += v;
            s2 += v * v;
            n += 1.0;
        }
    }
    (s2 / n - (s / n).powi(2)).sqrt()
}

#[test]
fn the_demo_window_shows_the_image_and_the_stage_maps() {
    let Some(img) = screenshot("1600x1000x24", &[], "window.png", 0) else {
        return;
    };
    // Not blank: many distinct colours overall.
    let mut colours: Vec<[u8; 3]> = img.pixels().map(|p| p.0).collect();
    colours.sort_unstable();
    colours.dedup();
    assert!(
        colours.len() > 2000,
        "only {} colours: a blank window?",
        colours.len()
    );
    // The strip (top band of the central area) holds the image and the stage panels: each
    // column band across it has picture content, i.e. the variance is high in every fifth.
    let (w, h) = img.dimensions();
    let band = |x0: u32, x1: u32| {
        let mut n = 0f64;
        let (mut s, mut s2) = (0f64, 0f64);
        for y in (h / 20)..(h * 3 / 10) {
            for x in x0..x1 {
                let p = img.get_pixel(x, y);
                let v = (p[0] as f64 + p[1] as f64 + p[2] as f64) / 3.0;
                s += v;
                s2 += v * v;
                n += 1.0;
            }
        }
        (s2 / n - (s / n).powi(2)).sqrt()
    };
    let left = w * 16 / 100; // right of the control column
    let step = (w * 76 / 100 - left) / 5;
    for k in 0..5 {
        let sd = band(left + k * step, left + (k + 1) * step);
        assert!(
            sd > 12.0,
            "strip band {k} is flat (sd {sd:.1}): image or a stage panel missing"
        );
    }
}

/// At 1280x720 the strip, the lens and the panels all fit: the lens below the strip shows a
/// picture, the regions panel is on screen.
#[test]
fn at_1280x720_the_lens_is_on_screen() {
    let Some(img) = screenshot(
        "1280x720x24",
        &["open", "--window-size", "1280x720"],
        "window-1280x720.png",
        1,
    ) else {
        return;
    };
    assert_eq!(img.dimensions(), (1280, 720));
    // The strip (upper central band) and the lens (lower central band) both show pictures.
    let strip = spread(&img, (0.2, 0.6), (0.08, 0.3));
    let lens = spread(&img, (0.25, 0.55), (0.55, 0.8));
    assert!(strip > 12.0, "strip flat (sd {strip:.1})");
    assert!(lens > 12.0, "lens flat or off screen (sd {lens:.1})");
}
