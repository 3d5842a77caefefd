//! Every figure renders to SVG and PNG: the files are valid, sized as
//! declared, and the PNG has text and marks on it (not a blank page).

use tessera_report::chart::*;

fn png_pixels(path: &std::path::Path) -> (u32, u32, Vec<u8>) {
    let decoder = png::Decoder::new(std::io::BufReader::new(
        std::fs::File::open(path).expect("png written"),
    ));
    let mut reader = decoder.read_info().expect("a valid png");
    let mut buf = vec![0; reader.output_buffer_size()];
    let info = reader.next_frame(&mut buf).expect("one frame");
    buf.truncate(info.buffer_size());
    (info.width, info.height, buf)
}

fn check(fig: &impl Figure, name: &str) {
    let dir = tempfile::tempdir().expect("temp dir");
    let svg = dir.path().join(format!("{name}.svg"));
    let png = dir.path().join(format!("{name}.png"));
    save(fig, &svg).expect("svg");
    save(fig, &png).expect("png");
    let text = std::fs::read_to_string(&svg).expect("svg text");
    assert!(
        text.starts_with("<svg") && text.contains("<text"),
        "{name}: svg without text"
    );
    let (w, h, px) = png_pixels(&png);
    assert_eq!((w, h), fig.size(), "{name}: png size");
    let dark = px.chunks(3).filter(|c| c.iter().all(|&v| v < 100)).count();
    let share = dark as f64 / (w * h) as f64;
    assert!(share > 0.001, "{name}: png nearly blank ({share})");
    if let Ok(keep) = std::env::var("TESSERA_KEEP_FIGURES") {
        std::fs::copy(
            &png,
            std::path::Path::new(&keep).join(format!("{name}.png")),
        )
        .ok();
        std::fs::copy(
            &svg,
            std::path::Path::new(&keep).join(format!("{name}.svg")),
        )
        .ok();
    }
}

#[test]
fn every_figure_renders() {
    let x = Axis::new("height_sd [um]", 0.1, 10.0, true);
    let curve: Vec<(f64, f64, f64, f64)> = (0..50)
        .map(|i| {
            let v = x.at(i as f64 / 49.0);
            let m = v.ln();
            (v, m, m - 0.3, m + 0.3)
        })
        .collect();
    check(
        &CurvePlot {
            title: "territory_cv against height_sd".into(),
            x: Some(x.clone()),
            y_label: "territory_cv".into(),
            curve,
            curve_label: "main effect".into(),
            observed: vec![(0.5, -0.6), (2.0, 0.8)],
            observed_label: "observed".into(),
            target: Some((1.0, 0.2, "target 1 +- 0.2".into())),
            unsure: vec![(5.0, 10.0)],
            y_bounds: [None, None],
        },
        "curve",
    );
    let xs: Vec<f64> = (0..30).map(|i| x.at(i as f64 / 29.0)).collect();
    let ys: Vec<f64> = (0..30).map(|j| j as f64 / 29.0 * 50.0).collect();
    let mean: Vec<Vec<f64>> = ys
        .iter()
        .map(|y| xs.iter().map(|x| x.ln() * y / 50.0).collect())
        .collect();
    let sd: Vec<Vec<f64>> = ys
        .iter()
        .map(|y| xs.iter().map(|_| y / 100.0).collect())
        .collect();
    check(
        &MapPlot {
            title: "map".into(),
            x: Some(x.clone()),
            y: Some(Axis::new("exclusion [um]", 0.0, 50.0, false)),
            xs,
            ys,
            mean,
            sd,
            metric: "territory_cv".into(),
            observed: vec![(1.0, 10.0)],
        },
        "map",
    );
    check(
        &BarPlot {
            title: "Sobol indices".into(),
            bars: vec![
                ("x1".into(), (0.31, 0.28, 0.35), (0.55, 0.5, 0.6)),
                ("x2".into(), (0.44, 0.4, 0.48), (0.44, 0.4, 0.48)),
            ],
        },
        "bars",
    );
    let samples: Vec<Vec<f64>> = (0..500)
        .map(|i| vec![0.1 + 9.0 * ((i * 37 % 500) as f64 / 500.0), (i % 50) as f64])
        .collect();
    check(
        &HistPanels {
            title: "posterior".into(),
            panels: vec![
                (
                    x.clone(),
                    samples.iter().map(|s| s[0]).collect(),
                    Some((1.0, 3.0)),
                ),
                (
                    Axis::new("exclusion [um]", 0.0, 50.0, false),
                    samples.iter().map(|s| s[1]).collect(),
                    None,
                ),
            ],
            uniform_reference: true,
        },
        "hist",
    );
    check(
        &PairsPlot {
            title: "pairs".into(),
            axes: vec![x.clone(), Axis::new("exclusion [um]", 0.0, 50.0, false)],
            samples: samples.clone(),
            region: samples.clone(),
        },
        "pairs",
    );
    check(
        &ScatterPanels {
            title: "implausibility".into(),
            y_label: "implausibility".into(),
            panels: vec![(x.clone(), samples.iter().map(|s| s[0]).collect())],
            ys: samples.iter().map(|s| s[1] / 5.0).collect(),
            hline: Some((3.0, "cutoff 3".into())),
            y_max: Some(8.0),
        },
        "scatter",
    );
    check(
        &ProgressPlot {
            title: "objective".into(),
            y_label: "value".into(),
            points: (0..40)
                .map(|i| (i as f64 + 1.0, ((i * 7) % 13) as f64))
                .collect(),
            minimise: true,
        },
        "progress",
    );
}
