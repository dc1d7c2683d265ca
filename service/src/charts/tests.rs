//! Every picture rendered by a real renderer (librsvg's `rsvg-convert`, Debian package librsvg2-bin): the canvas is
//! widened by a band on every side with the background left out, and no pixel of ink may land in the band, so no
//! text (title, ticks, legend, notes) runs off the canvas. Also: every axis has tick labels, legends do not overlap.

use std::process::Command;

use probity_models::metrics::{calibration_table, BinStrategy};

use super::pictures::{self, bins_of, Curve, ProbabilityAxis};
use super::{palette, wrap, Picture, Scale};

const BAND: f64 = 120.0;

/// Renders `svg` with the canvas widened by [`BAND`] on every side and no background; returns the number of
/// non-transparent pixels outside the original canvas, or `None` where rsvg-convert is not installed.
fn ink_outside(svg: &str) -> Option<usize> {
    if Command::new("rsvg-convert")
        .arg("--version")
        .output()
        .is_err()
    {
        // tests/run installs it and sets this variable, so CI cannot skip the check silently.
        assert!(
            std::env::var_os("PROBITY_REQUIRE_SVG_RENDERER").is_none(),
            "rsvg-convert is required (Debian: librsvg2-bin) but not installed"
        );
        eprintln!("rsvg-convert not installed (Debian: librsvg2-bin); rendering not checked");
        return None;
    }
    let doc = roxmltree::Document::parse(svg).expect("well-formed SVG");
    let root = doc.root_element();
    let attr = |n: &str| -> f64 { root.attribute(n).and_then(|v| v.parse().ok()).expect(n) };
    let (w, h) = (attr("width"), attr("height"));
    let (ww, hh) = (w + 2.0 * BAND, h + 2.0 * BAND);
    let widened = svg
        .replacen(
            &format!(r#"width="{w}" height="{h}" viewBox="0 0 {w} {h}""#),
            &format!(
                r#"width="{ww}" height="{hh}" viewBox="{} {} {ww} {hh}""#,
                -BAND, -BAND
            ),
            1,
        )
        .replace(
            r#"<rect class="background" width="100%" height="100%" fill="white"/>"#,
            "",
        );
    assert_ne!(
        widened, svg,
        "the picture's header is not the one this test widens"
    );
    let dir = tempfile::tempdir().expect("temp dir");
    let (input, output) = (dir.path().join("p.svg"), dir.path().join("p.png"));
    std::fs::write(&input, widened).expect("write");
    let status = Command::new("rsvg-convert")
        .arg(&input)
        .arg("-o")
        .arg(&output)
        .status()
        .expect("run rsvg-convert");
    assert!(status.success(), "rsvg-convert failed");
    let decoder = png::Decoder::new(std::io::BufReader::new(
        std::fs::File::open(&output).expect("png"),
    ));
    let mut reader = decoder.read_info().expect("png header");
    let mut buf = vec![0; reader.output_buffer_size().expect("size")];
    let info = reader.next_frame(&mut buf).expect("png frame");
    assert_eq!(info.color_type, png::ColorType::Rgba);
    let (pw, ph) = (info.width as usize, info.height as usize);
    let band = BAND as usize;
    let mut outside = 0;
    for y in 0..ph {
        for x in 0..pw {
            let alpha = buf[(y * pw + x) * 4 + 3];
            let inside = x >= band && x < pw - band && y >= band && y < ph - band;
            if alpha > 0 && !inside {
                outside += 1;
            }
        }
    }
    Some(outside)
}

fn texts(svg: &str, class: &str) -> Vec<String> {
    let doc = roxmltree::Document::parse(svg).expect("well-formed SVG");
    doc.descendants()
        .filter(|n| n.has_tag_name("text") && n.attribute("class") == Some(class))
        .map(|n| n.text().unwrap_or_default().to_string())
        .collect()
}

fn fraud_table() -> probity_models::metrics::CalibrationTable {
    // A fraud-like score distribution: most cases near 0.001, a thin tail; a deterministic pattern of labels.
    let p: Vec<f64> = (0..4000)
        .map(|i| {
            let u = (f64::from(i) + 0.5) / 4000.0;
            1.0 / (1.0 + (-(-7.0 + 6.0 * u * u * u)).exp())
        })
        .collect();
    let y: Vec<bool> = p
        .iter()
        .enumerate()
        .map(|(i, &q)| ((i * 7919) % 1000) as f64 / 1000.0 < q)
        .collect();
    calibration_table(&p, &y[..], BinStrategy::Quantile(10)).expect("table")
}

fn long(text: &str) -> String {
    format!(
        "{text} {}",
        "with a very long route name and model version ".repeat(4)
    )
}

#[test]
fn every_picture_keeps_its_ink_inside_the_canvas_and_labels_both_axes() {
    let table = fraud_table();
    let curve = |label: String, class, colour, t| Curve {
        label,
        colour,
        class,
        bins: bins_of(t),
    };
    let reliability = pictures::reliability(
        &long("Reliability: route card-authorisation-emea"),
        &[
            curve(long("champion"), "champion", palette::TIDE, &table),
            curve(long("challenger"), "challenger", palette::OCHRE, &table),
            // An estimated curve (the report's immature window) with its own intervals, one reaching 0.
            Curve {
                label: long("ESTIMATED eventual share"),
                colour: palette::RUST,
                class: "estimated",
                bins: bins_of(&table)
                    .into_iter()
                    .map(|b| pictures::Bin {
                        interval: Some((0.0, (2.0 * b.fraction_positive).min(1.0))),
                        estimated: true,
                        ..b
                    })
                    .collect(),
            },
        ],
        ProbabilityAxis::Auto,
        &[(palette::INK, long("ECE 0.0012 over 4000 cases"))],
    );
    let histograms = pictures::class_histograms(
        &long("Scores by class"),
        &[9000, 500, 120, 30, 5, 1, 0, 0, 0, 0],
        &[10, 8, 6, 9, 12, 3, 1, 0, 0, 1],
    );
    let gains = pictures::gains(
        &long("Cumulative gains"),
        &[(0.1, 0.4), (0.5, 0.8), (1.0, 1.0)],
    );
    let mut both = Picture::new(&long("Champion against challenger"));
    both.plot(pictures::reliability_plot(
        &[curve("a".into(), "champion", palette::TIDE, &table)],
        ProbabilityAxis::Linear,
    ));
    both.plot(pictures::differences_plot(
        &[-0.3, -0.01, 0.0, 0.02, 0.5],
        30,
        &long("log-loss difference per paired case"),
    ));
    for i in 0..9 {
        both.legend(
            palette::SERIES[i % 4],
            &format!("legend entry number {i} of nine"),
        );
    }
    both.note(
        palette::INK,
        &long("Verdict: not enough outcomes yet to tell the two apart"),
    );
    let pictures = [
        ("reliability", reliability),
        ("histograms", histograms),
        ("gains", gains),
        ("comparison", both.render()),
    ];
    for (name, svg) in &pictures {
        // Ticks labelled on both axes of every plot (a plot has at least 2 on each).
        let ticks = texts(svg, "tick");
        assert!(ticks.len() >= 4, "{name}: ticks {ticks:?}");
        assert!(ticks.iter().all(|t| !t.is_empty()), "{name}");
        if let Some(outside) = ink_outside(svg) {
            assert_eq!(
                outside, 0,
                "{name}: {outside} pixels of ink outside the canvas"
            );
        }
    }
    // At a fraud base rate the probability axes are on the log-odds scale, labelled as probabilities.
    let r = &pictures[0].1;
    assert!(
        texts(r, "axis-name").iter().all(|t| t.contains("log-odds")),
        "{r}"
    );
    assert!(
        texts(r, "tick").iter().any(|t| t == "0.1%"),
        "{:?}",
        texts(r, "tick")
    );
}

#[test]
fn legend_entries_never_overlap() {
    let mut p = Picture::new("t");
    p.plot(super::Plot::new(Scale::Unit, Scale::Unit, "x", "y"));
    for i in 0..12 {
        p.legend(
            palette::TIDE,
            &format!("a legend entry with a longer label {i}"),
        );
    }
    let svg = p.render();
    let doc = roxmltree::Document::parse(&svg).expect("svg");
    let boxes: Vec<(f64, f64, f64)> = doc
        .descendants()
        .filter(|n| n.attribute("class") == Some("legend"))
        .map(|g| {
            let text = g.children().find(|c| c.has_tag_name("text")).expect("text");
            let rect = g.children().find(|c| c.has_tag_name("rect")).expect("rect");
            let x: f64 = rect.attribute("x").and_then(|v| v.parse().ok()).expect("x");
            let y: f64 = text.attribute("y").and_then(|v| v.parse().ok()).expect("y");
            let w = 18.0 + super::text_width(text.text().unwrap_or_default(), 12.0);
            (x, x + w, y)
        })
        .collect();
    assert_eq!(boxes.len(), 12);
    for (i, a) in boxes.iter().enumerate() {
        for b in &boxes[i + 1..] {
            let same_row = (a.2 - b.2).abs() < 1.0;
            assert!(
                !(same_row && a.0 < b.1 && b.0 < a.1),
                "{a:?} overlaps {b:?}"
            );
        }
    }
}

#[test]
fn wrap_keeps_lines_within_the_width() {
    let text = "Verdict: the challenger's log-loss is lower by 0.0031 (p = 0.012, paired test), averyveryverylongwordwithoutspacesatall";
    for line in wrap(text, 200.0, 12.0) {
        assert!(super::text_width(&line, 12.0) <= 200.0, "{line}");
    }
    assert_eq!(wrap("", 200.0, 12.0), Vec::<String>::new());
}

#[test]
fn log_odds_ticks_are_probabilities_within_the_range() {
    let s = Scale::log_odds_for([0.0004, 0.003, 0.02]);
    let ticks = s.ticks();
    let labels: Vec<&str> = ticks.iter().map(|(_, l)| l.as_str()).collect();
    assert!(
        labels.contains(&"0.1%") && labels.contains(&"1%"),
        "{labels:?}"
    );
    for (v, _) in &ticks {
        let f = s.frac(*v);
        assert!((0.0..=1.0).contains(&f));
    }
    assert!(s.frac(0.001) < s.frac(0.01));
}
