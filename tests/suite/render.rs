//! The shared renderer on an odd-size image: grid lines exactly on the window borders the
//! geometry gives, hatching only outside the image, map colours equal to the colour map blended
//! at the chosen opacity, legends and captions drawn; and the figure command end to end.

use image::{Rgb, RgbImage, RgbaImage};
use mullion::analysis::{
    normalise_maps, parse_map_kind, Colormap, Map, MapKind, PreparedStage, ScaleSpec, TokenNorm,
};
use mullion::engine::input::{self, Normalisation};
use mullion::engine::SessionOptions;
use mullion::engine::{Backbone, Config, ForwardOptions, RunControl, StageOutputs};
use mullion::headless::{save_figure as figure, FigureOptions};
use mullion::render::{
    self, compose_figure, render_legend, render_panel, FigureSpec, Overlays, PanelStyle,
    BACKGROUND, PADDING_FILL, PADDING_HATCH, REGULAR_GRID, SHIFTED_GRID,
};
use std::collections::BTreeSet;
use std::path::{Path, PathBuf};

const H: u32 = 97;
const W: u32 = 160;

fn test_image() -> RgbImage {
    RgbImage::from_fn(W, H, |x, y| {
        Rgb([
            (x * 255 / W) as u8,
            (y * 255 / H) as u8,
            ((x * 7 + y * 13) % 200) as u8,
        ])
    })
}

fn forward(img: &RgbImage) -> StageOutputs {
    let cfg = Config {
        embed_dim: 16,
        depths: vec![2, 2, 2, 2],
        heads: vec![1, 2, 4, 8],
        ..Config::tiny()
    };
    assert_eq!((cfg.patch, cfg.window), (4, (7, 7)));
    let model = Backbone::random(cfg, 3).unwrap();
    let x = input::normalise(img, &Normalisation::IMAGENET).unwrap();
    model
        .forward(&x, &ForwardOptions::default(), &RunControl::default())
        .unwrap()
}

fn norm_maps(out: &StageOutputs) -> Vec<Map> {
    let raw: Vec<Map> = (0..out.stages.len())
        .map(|s| TokenNorm.compute(out, s).unwrap())
        .collect();
    normalise_maps(&raw, &ScaleSpec::default())
        .unwrap()
        .into_iter()
        .map(|p| p.0)
        .collect()
}

fn only(regular: bool, shifted: bool, padding: bool, scale: f32) -> PanelStyle {
    PanelStyle {
        colormap: Colormap::Viridis,
        opacity: 0.6,
        overlays: Overlays {
            regular_grid: regular,
            shifted_grid: shifted,
            padding,
            block: 0,
            grid_in_padding: true,
            line_width: 1,
        },
        scale,
    }
}

fn rgb(img: &RgbaImage, x: u32, y: u32) -> [u8; 3] {
    let p = img.get_pixel(x, y).0;
    [p[0], p[1], p[2]]
}

fn save_for_inspection(img: &RgbaImage, name: &str) {
    let dir = Path::new(env!("CARGO_TARGET_TMPDIR")).join("render");
    std::fs::create_dir_all(&dir).unwrap();
    mullion::io::save_png_atomic(img, &dir.join(name)).unwrap();
}

/// Border pixel positions along one axis, from the pieces' token spans: every span start and
/// end times the stride times the scale; the far edge of the canvas moves one pixel in so the
/// line stays visible.
fn expected_borders(
    spans: &[(usize, usize)],
    stride: usize,
    scale: usize,
    canvas: u32,
) -> BTreeSet<u32> {
    let mut set = BTreeSet::new();
    for &(a, b) in spans {
        for t in [a, b] {
            set.insert(((t * stride * scale) as u32).min(canvas - 1));
        }
    }
    set
}

#[test]
fn grid_lines_sit_exactly_on_window_borders() {
    let img = test_image();
    let out = forward(&img);
    let maps = norm_maps(&out);
    let g = &out.geometry;
    assert_eq!(g.image, (97, 160));
    for scale in [1usize, 2] {
        for (s, sg) in g.stages.iter().enumerate() {
            for (shifted, colour) in [(false, REGULAR_GRID), (true, SHIFTED_GRID)] {
                let block = &sg.blocks[shifted as usize];
                if shifted && !block.is_shifted() {
                    continue;
                }
                let style = only(!shifted, shifted, false, scale as f32);
                let panel = render_panel(&img, &maps[s], g, s, &style).unwrap();
                let (pr, pc) = sg.padded();
                assert_eq!(panel.width() as usize, pc * sg.stride * scale);
                assert_eq!(panel.height() as usize, pr * sg.stride * scale);
                let pieces = block.pieces();
                let col_spans: Vec<_> = pieces.iter().map(|p| (p.col0, p.col1)).collect();
                let row_spans: Vec<_> = pieces.iter().map(|p| (p.row0, p.row1)).collect();
                let xs = expected_borders(&col_spans, sg.stride, scale, panel.width());
                let ys = expected_borders(&row_spans, sg.stride, scale, panel.height());
                if !shifted {
                    // Regular windows: borders at every multiple of window * stride.
                    let (wr, wc) = block.window();
                    let step = wc * sg.stride * scale;
                    let want: BTreeSet<u32> = (0..=pc / wc)
                        .map(|k| ((k * step) as u32).min(panel.width() - 1))
                        .collect();
                    assert_eq!(xs, want, "stage {s}");
                    assert_eq!(ys.len(), pr / wr + 1);
                }
                for y in 0..panel.height() {
                    for x in 0..panel.width() {
                        let on_line = xs.contains(&x) || ys.contains(&y);
                        let is_colour = rgb(&panel, x, y) == colour;
                        assert_eq!(
                            on_line, is_colour,
                            "stage {s} shifted {shifted} scale {scale}: pixel ({x}, {y})"
                        );
                    }
                }
                if s == 0 && shifted && scale == 1 {
                    save_for_inspection(&panel, "stage0_shifted.png");
                }
            }
        }
    }
}

#[test]
fn map_pixels_are_the_colour_map_blended_and_hatch_only_outside() {
    let img = test_image();
    let out = forward(&img);
    let maps = norm_maps(&out);
    let g = &out.geometry;
    let opacity = 0.6f32;
    for (s, sg) in g.stages.iter().enumerate() {
        let panel = render_panel(&img, &maps[s], g, s, &only(false, false, true, 1.0)).unwrap();
        let values = maps[s].scalars().unwrap();
        let mut hatch = 0;
        for y in 0..panel.height() {
            for x in 0..panel.width() {
                let p = rgb(&panel, x, y);
                if x < W && y < H {
                    let t = (y as usize / sg.stride) * sg.grid.1 + x as usize / sg.stride;
                    let c = Colormap::Viridis.lookup(values[t]);
                    let base = img.get_pixel(x, y).0;
                    for k in 0..3 {
                        let want = (1.0 - opacity) * base[k] as f32 + opacity * 255.0 * c[k];
                        assert!(
                            (p[k] as f32 - want).abs() <= 0.5 + 1e-3,
                            "stage {s} ({x}, {y}) channel {k}: {} vs {want}",
                            p[k]
                        );
                    }
                } else {
                    assert!(
                        p == PADDING_HATCH || p == PADDING_FILL,
                        "stage {s} ({x}, {y})"
                    );
                    hatch += (p == PADDING_HATCH) as usize;
                }
            }
        }
        assert!(hatch > 0, "stage {s}: padding shows no hatch");
        // Without the padding overlay the padded area is plain.
        let plain = render_panel(&img, &maps[s], g, s, &only(false, false, false, 1.0)).unwrap();
        assert!(plain.pixels().all(|p| p.0[..3] != PADDING_HATCH));
    }
    // The bare map: opacity 1 wherever there is image.
    let bare = render::render_map_only(&maps[0], g, 0, &only(false, false, true, 1.0)).unwrap();
    let v = maps[0].scalars().unwrap()[0];
    assert_eq!(rgb(&bare, 1, 1), Colormap::Viridis.lookup_u8(v));
}

#[test]
fn mismatched_inputs_are_errors_not_panics() {
    let img = test_image();
    let out = forward(&img);
    let maps = norm_maps(&out);
    let g = &out.geometry;
    let style = only(true, true, true, 1.0);
    assert!(render_panel(&img, &maps[1], g, 0, &style).is_err());
    assert!(render_panel(&img, &maps[0], g, 9, &style).is_err());
    let small = RgbImage::new(10, 10);
    assert!(render_panel(&small, &maps[0], g, 0, &style).is_err());
    assert!(render_panel(
        &img,
        &maps[0],
        g,
        0,
        &PanelStyle {
            scale: 0.0,
            ..style
        }
    )
    .is_err());
    assert!(render_panel(
        &img,
        &maps[0],
        g,
        0,
        &PanelStyle {
            scale: 1e6,
            ..style
        }
    )
    .is_err());
}

fn non_background(img: &RgbaImage, rows: std::ops::Range<u32>) -> usize {
    rows.flat_map(|y| (0..img.width()).map(move |x| (x, y)))
        .filter(|&(x, y)| rgb(img, x, y) != BACKGROUND)
        .count()
}

fn dark(img: &RgbaImage, rows: std::ops::Range<u32>) -> usize {
    rows.flat_map(|y| (0..img.width()).map(move |x| (x, y)))
        .filter(|&(x, y)| rgb(img, x, y).iter().all(|&c| c < 90))
        .count()
}

#[test]
fn legend_and_caption_are_drawn() {
    let range = mullion::analysis::ScaleRange {
        lo: 0.37,
        hi: 12.9,
        log: false,
    };
    let legend = render_legend(Colormap::Magma, &range, 320, 40);
    assert!(non_background(&legend, 0..legend.height()) > 0);
    // Numbers below the bar: dark text pixels in the lower half.
    assert!(dark(&legend, legend.height() / 2..legend.height()) > 20);
    save_for_inspection(&legend, "legend.png");
    let vertical = render_legend(
        Colormap::Cividis,
        &mullion::analysis::ScaleRange {
            lo: 0.01,
            hi: 100.0,
            log: true,
        },
        90,
        300,
    );
    assert!(dark(&vertical, 0..vertical.height()) > 20);
    save_for_inspection(&vertical, "legend_log.png");

    let img = test_image();
    let out = forward(&img);
    let raw: Vec<Map> = (0..4)
        .map(|s| TokenNorm.compute(&out, s).unwrap())
        .collect();
    let scaled = normalise_maps(&raw, &ScaleSpec::default()).unwrap();
    let stages: Vec<PreparedStage> = scaled
        .into_iter()
        .enumerate()
        .map(|(stage, (map, range))| PreparedStage {
            stage,
            map,
            range: Some(range),
            explained: None,
        })
        .collect();
    let px = 14.0;
    let fig = compose_figure(&FigureSpec {
        image: &img,
        geometry: &out.geometry,
        stages: &stages,
        style: PanelStyle {
            scale: 2.0,
            ..PanelStyle::default()
        },
        checkpoint: "random-weights".into(),
        map_label: TokenNorm.label(),
        notes: vec![],
        text_px: px,
    })
    .unwrap();
    save_for_inspection(&fig, "figure.png");
    // The caption's last lines (the caution) sit just above the bottom margin.
    let margin = (px * 1.2f32).round() as u32;
    let lh = render::line_height(px).ceil() as u32;
    let band = fig.height() - margin - 2 * lh..fig.height() - margin;
    assert!(dark(&fig, band) > 100, "no caption text");
    assert!(non_background(&fig, fig.height() - margin + 2..fig.height()) == 0);
    // Wider than the strip of five panels side by side.
    let strip: u32 = out
        .geometry
        .stages
        .iter()
        .map(|s| (s.padded().1 * s.stride * 2) as u32)
        .sum::<u32>()
        + 2 * W;
    assert!(fig.width() >= strip);
}

fn fixture(name: &str) -> PathBuf {
    crate::common::fixtures().join(name)
}

fn map(id: &str) -> std::sync::Arc<dyn MapKind> {
    std::sync::Arc::from(parse_map_kind(id).unwrap())
}

#[test]
fn figure_command_writes_png_and_stats() {
    let dir = tempfile::tempdir().unwrap();
    let case = fixture("timm_odd");
    let mut args = FigureOptions::new(
        SessionOptions::new(case.join("weights.safetensors")),
        case.join("input.png"),
        dir.path().join("fig.png"),
    );
    args.stats = Some(dir.path().join("stats.json"));
    args.csv = Some(dir.path().join("stats.csv"));
    figure(&args).unwrap();
    let png = image::open(dir.path().join("fig.png")).unwrap();
    assert!(png.width() > 150 * 5 && png.height() > 115);
    std::fs::copy(
        dir.path().join("fig.png"),
        Path::new(env!("CARGO_TARGET_TMPDIR")).join("timm_odd_norm.png"),
    )
    .unwrap();
    // Stage grids recorded by the reference (tests/fixtures/timm_odd/case.json, timm 1.0.31).
    let stats: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(dir.path().join("stats.json")).unwrap())
            .unwrap();
    let grids: Vec<(u64, u64)> = stats
        .as_array()
        .unwrap()
        .iter()
        .map(|s| (s["rows"].as_u64().unwrap(), s["cols"].as_u64().unwrap()))
        .collect();
    assert_eq!(grids, vec![(29, 38), (15, 19), (8, 10), (4, 5)]);
    for s in stats.as_array().unwrap() {
        let f = |k: &str| s[k].as_f64().unwrap();
        assert!(f("min") <= f("p1") && f("p1") <= f("p50") && f("p50") <= f("p99"));
        assert!(f("p99") <= f("max") && f("min") >= 0.0);
        assert_eq!(s["input_h"], 115);
        assert_eq!(s["input_pad_bottom"], 1);
        assert_eq!(s["input_pad_right"], 2);
    }
    assert_eq!(stats[0]["window_pad_rows"], 35 - 29);
    let csv = std::fs::read_to_string(dir.path().join("stats.csv")).unwrap();
    assert_eq!(csv.lines().count(), 5);

    // The other kinds.
    for map in ["pca", "channel:3"] {
        let mut a = args.clone();
        a.map = self::map(map);
        a.stats = None;
        a.csv = None;
        a.out = dir.path().join(format!("{}.png", map.replace(':', "_")));
        figure(&a).unwrap();
        std::fs::copy(
            &a.out,
            Path::new(env!("CARGO_TARGET_TMPDIR"))
                .join(format!("timm_odd_{}.png", map.replace(':', "_"))),
        )
        .unwrap();
    }
    // User errors come back as errors naming what is wrong.
    let mut bad = args.clone();
    bad.out = dir.path().join("missing-folder/fig.png");
    let e = figure(&bad).unwrap_err().to_string();
    assert!(e.contains("missing-folder"), "{e}");
    let mut bad = args.clone();
    bad.map = map("channel:9999");
    assert!(figure(&bad).unwrap_err().to_string().contains("9999"));
    let mut bad = args.clone();
    bad.map = map("pca");
    assert!(figure(&bad).is_err(), "stats of a colour map");
}

#[test]
fn ticks_are_round_and_inside_the_range() {
    for (lo, hi) in [
        (0.37f32, 12.9f32),
        (4.6, 8.9),
        (-2.7, 1.3),
        (1000.0, 1003.0),
        (0.0, 1.0),
    ] {
        let (t, step) = render::linear_ticks(lo, hi, 5);
        assert!((3..=8).contains(&t.len()), "{lo}..{hi}: {t:?}");
        assert!(t.iter().all(|&v| v >= lo - 1e-4 && v <= hi + 1e-4), "{t:?}");
        let mant = step / 10f32.powf(step.log10().floor());
        assert!(
            [1.0, 2.0, 5.0].iter().any(|m| (mant - m).abs() < 1e-3),
            "step {step}"
        );
    }
    assert_eq!(
        render::log_ticks(0.01, 100.0),
        vec![0.01, 0.1, 1.0, 10.0, 100.0]
    );
    assert_eq!(render::format_tick(2.5, 0.5), "2.5");
    assert_eq!(render::format_tick(1000.0, 1.0), "1000");
    assert_eq!(render::format_tick(2.0e6, 1e6), "2.0e6");
}

/// CIE 1976 L*a*b* of an sRGB colour in [0, 1] (sRGB decoding per IEC 61966-2-1, D65 white,
/// the handbook formulas).
fn lab(c: [f64; 3]) -> [f64; 3] {
    let lin = |u: f64| {
        if u > 0.04045 {
            ((u + 0.055) / 1.055).powf(2.4)
        } else {
            u / 12.92
        }
    };
    let [r, g, b] = c.map(lin);
    let x = (0.4124 * r + 0.3576 * g + 0.1805 * b) / 0.95047;
    let y = 0.2126 * r + 0.7152 * g + 0.0722 * b;
    let z = (0.0193 * r + 0.1192 * g + 0.9505 * b) / 1.08883;
    let f = |t: f64| {
        if t > 0.008856 {
            t.cbrt()
        } else {
            7.787 * t + 16.0 / 116.0
        }
    };
    let (fx, fy, fz) = (f(x), f(y), f(z));
    [116.0 * fy - 16.0, 500.0 * (fx - fy), 200.0 * (fy - fz)]
}

fn delta_e(a: [f64; 3], b: [f64; 3]) -> f64 {
    let (a, b) = (lab(a), lab(b));
    ((a[0] - b[0]).powi(2) + (a[1] - b[1]).powi(2) + (a[2] - b[2]).powi(2)).sqrt()
}

fn unit(c: [u8; 3]) -> [f64; 3] {
    c.map(|v| v as f64 / 255.0)
}

/// Label, pin, grid and padding colours stay apart from each other (25 Delta E, CIE 1976) and
/// the ones drawn over maps from every entry of every colour map offered (30 Delta E; tables
/// from matplotlib 3.11.2).
#[test]
fn overlay_and_label_colours_stay_apart_from_each_other_and_the_maps() {
    let mut named: Vec<(String, [u8; 3])> = mullion::annotation::PALETTE
        .iter()
        .zip(mullion::annotation::PALETTE_NAMES)
        .map(|(c, n)| (format!("label {n}"), *c))
        .collect();
    named.push(("pin".into(), mullion::annotation::PIN_COLOUR));
    named.push(("regular grid".into(), REGULAR_GRID));
    named.push(("shifted grid".into(), SHIFTED_GRID));
    let over_maps = named.clone();
    named.push(("padding hatch".into(), PADDING_HATCH));
    named.push(("padding fill".into(), PADDING_FILL));
    for (i, (na, a)) in named.iter().enumerate() {
        for (nb, b) in &named[i + 1..] {
            let d = delta_e(unit(*a), unit(*b));
            assert!(d >= 25.0, "{na} and {nb} are only {d:.1} apart");
        }
    }
    for cm in Colormap::ALL {
        for entry in cm.table() {
            let e = entry.map(|v| v as f64);
            for (n, c) in &over_maps {
                let d = delta_e(unit(*c), e);
                assert!(d >= 30.0, "{n} is {d:.1} from an entry of {}", cm.name());
            }
        }
    }
    // The check can fail: the old shifted-grid cyan sat close to a label blue.
    assert!(delta_e(unit([0, 220, 255]), unit([40, 200, 255])) < 25.0);
}
