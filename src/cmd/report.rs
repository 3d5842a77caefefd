//! `tessera report`: one HTML page to show the lab: the sweep, its
//! progress, where runs failed, how far the surrogates can be trusted,
//! which constants matter, main effects, a map, and the calibration.
//! Gathers the answers from the queries and hands numbers and words to
//! `tessera_report`, which lays them out.

use anyhow::Context;
use std::path::PathBuf;
use std::process::ExitCode;
use tessera_coordinator::fitter::{MetricFit, FAILURE_RATE};
use tessera_coordinator::query::{self, effects, CalibrateOptions, TrendKind};
use tessera_coordinator::spec::{Scale, Spec};
use tessera_coordinator::status::{PointResults, SweepStatus};
use tessera_coordinator::store::Store;
use tessera_models::text::{short, with_unit};
use tessera_report::chart::{self, Figure};
use tessera_report::html::{self, FigureRef, Page, Section, Table};

/// Arguments of `tessera report`.
#[derive(clap::Args, Debug)]
#[command(after_help = "\
Examples:
  tessera report --db sweep.db --out report
      writes report/index.html (one file that opens offline) and
      report/figures/*.png (the same figures for slides)")]
pub struct ReportArgs {
    /// The sweep database.
    #[arg(long, value_name = "FILE")]
    pub db: PathBuf,
    /// Directory for index.html and the PNG figures (created if needed).
    #[arg(long, value_name = "DIR")]
    pub out: PathBuf,
    /// Most metrics given main-effect plots (targets and the objective first).
    #[arg(long, default_value = "6", value_name = "N")]
    pub max_metrics: usize,
}

/// Writes figures as PNG beside the page and embeds them as SVG.
struct Figures {
    dir: PathBuf,
    count: usize,
}

impl Figures {
    fn add(
        &mut self,
        fig: &impl Figure,
        name: &str,
        caption: String,
        alt: String,
    ) -> anyhow::Result<FigureRef> {
        self.count += 1;
        let file = format!("{:02}-{}.png", self.count, super::file_word(name));
        chart::save(fig, &self.dir.join(&file))?;
        let mut r = FigureRef::svg(fig, caption, alt)?;
        r.png = Some(format!("figures/{file}"));
        Ok(r)
    }
}

/// Metrics worth showing, in order: targets, the objective, then the rest
/// (never the failure rate).
fn metric_order(spec: &Spec, fits: &[MetricFit]) -> Vec<String> {
    let mut out: Vec<String> = Vec::new();
    let mut push = |m: &str| {
        if fits.iter().any(|f| f.metric == m) && !out.iter().any(|o| o == m) {
            out.push(m.to_string());
        }
    };
    for t in &spec.targets {
        push(&t.metric);
    }
    if let Some(o) = &spec.objective {
        push(&o.metric);
    }
    for f in fits {
        if f.metric != FAILURE_RATE && f.metric != spec.objective_label() {
            push(&f.metric);
        }
    }
    out
}

fn sweep_section(spec: &Spec, st: &SweepStatus, text: &str) -> Section {
    let params = Table {
        caption: "Swept constants".into(),
        header: vec![
            "parameter".into(),
            "range".into(),
            "scale".into(),
            "description".into(),
        ],
        rows: spec
            .params
            .iter()
            .map(|p| {
                vec![
                    p.name.clone(),
                    with_unit(format!("{} to {}", short(p.lo), short(p.hi)), &p.unit),
                    format!(
                        "{}{}",
                        p.scale.as_str(),
                        if p.integer { ", whole numbers" } else { "" }
                    ),
                    p.description.clone(),
                ]
            })
            .collect(),
    };
    let mut intro = vec![format!(
        "Model {}: {} points of a budget of {}, {} run(s) each; {} runs done, {} failed.",
        spec.model.name, st.points, st.budget, st.replicates, st.done, st.failed
    )];
    if !spec.description.is_empty() {
        intro.insert(0, spec.description.clone());
    }
    if let Some(r) = &st.stop_reason {
        intro.push(format!("The sweep {r}."));
    }
    let _ = text;
    Section {
        id: "sweep".into(),
        title: "The sweep".into(),
        intro,
        tables: vec![params],
        notes: vec!["The sweep file itself is at the end of this page.".into()],
        ..Default::default()
    }
}

fn sweep_file_section(text: &str) -> Section {
    Section {
        id: "sweep-file".into(),
        title: "Sweep file".into(),
        intro: vec!["As stored with the results:".into()],
        pre: Some(text.to_string()),
        ..Default::default()
    }
}

fn progress_section(
    spec: &Spec,
    st: &SweepStatus,
    results: &[PointResults],
    figs: &mut Figures,
) -> anyhow::Result<Section> {
    let points: Vec<(f64, f64)> = results
        .iter()
        .filter_map(|p| {
            let v: Vec<f64> = p.replicates.iter().filter_map(|m| spec.loss(m)).collect();
            if v.is_empty() {
                return None;
            }
            let mean = v.iter().sum::<f64>() / v.len() as f64;
            Some((p.idx as f64 + 1.0, spec.display_objective(mean)))
        })
        .collect();
    let maximise = matches!(&spec.objective, Some(o) if o.direction == tessera_coordinator::spec::Direction::Maximize);
    let mut s = Section {
        id: "progress".into(),
        title: "Progress".into(),
        ..Default::default()
    };
    if points.is_empty() {
        s.intro.push("No point has finished runs yet.".into());
        return Ok(s);
    }
    let fig = chart::ProgressPlot {
        title: format!("{} at each point, in the order run", st.objective_label),
        y_label: st.objective_label.clone(),
        points,
        minimise: !maximise,
    };
    s.intro.push(format!(
        "Each dot is one point's mean over its runs; the line is the best so far. The first {} points are the space-filling design; the rest were chosen by the {} strategy.",
        spec.initial,
        spec.strategy.as_str()
    ));
    s.figures.push(figs.add(
        &fig,
        "progress",
        format!("{} against the order of the points", st.objective_label),
        "objective against evaluations".into(),
    )?);
    if let Some(b) = &st.best {
        let mut params: Vec<String> = spec
            .params
            .iter()
            .filter_map(|p| {
                b.params
                    .get(&p.name)
                    .map(|v| with_unit(format!("{} = {}", p.name, short(*v)), &p.unit))
            })
            .collect();
        params.sort();
        s.notes.push(format!(
            "Best point so far: {} = {} at {}.",
            st.objective_label,
            short(b.objective),
            params.join(", ")
        ));
    }
    if !st.waves.is_empty() {
        s.tables.push(Table {
            caption: "Calibration waves: the share of the box the targets had not ruled out when each wave was chosen".into(),
            header: vec!["wave".into(), "points fitted".into(), "share of the box".into()],
            rows: st
                .waves
                .iter()
                .map(|w| {
                    vec![
                        w.wave.to_string(),
                        w.points.to_string(),
                        format!("{:.1}% +- {:.1}%", 100.0 * w.fraction, 100.0 * w.fraction_se),
                    ]
                })
                .collect(),
        });
    }
    Ok(s)
}

fn failures_section(st: &SweepStatus) -> Section {
    let mut s = Section {
        id: "failures".into(),
        title: "Failed runs".into(),
        ..Default::default()
    };
    if st.failed == 0 {
        s.intro.push("No run failed.".into());
        return s;
    }
    s.intro.push(format!(
        "{} of {} finished runs failed, after retries.",
        st.failed,
        st.failed + st.done
    ));
    s.tables.push(Table {
        caption: "Failures by reason".into(),
        header: vec!["runs".into(), "reason".into()],
        rows: st
            .failures
            .iter()
            .map(|(r, n)| vec![n.to_string(), r.clone()])
            .collect(),
    });
    if let Some(r) = &st.failure_region {
        s.notes.push(format!("Where runs fail: {r}."));
    }
    s
}

fn trust_section(fits: &[MetricFit]) -> Section {
    let verdicts = query::check_fit(fits);
    Section {
        id: "trust".into(),
        title: "Can the surrogates be trusted?".into(),
        intro: vec!["Each surrogate predicts every point from all the others (leave-one-out). Q2 near 1 means the metric's variation is captured; about 95% of points should fall inside their own 95% interval.".into()],
        tables: vec![Table {
            caption: "Leave-one-out checks".into(),
            header: vec!["metric".into(), "points".into(), "Q2".into(), "inside 95% interval".into(), "typical error".into(), "verdict".into(), "why".into()],
            rows: verdicts
                .iter()
                .map(|v| {
                    vec![
                        v.metric.clone(),
                        v.n_points.to_string(),
                        format!("{:.2}", v.q2),
                        format!("{:.0}%", 100.0 * v.coverage95),
                        with_unit(short(v.loo_rmse), &v.unit),
                        v.verdict.as_str().to_string(),
                        v.reason.clone(),
                    ]
                })
                .collect(),
        }],
        ..Default::default()
    }
}

/// Runs `tessera report`.
pub fn run(args: ReportArgs) -> anyhow::Result<ExitCode> {
    let (st, spec) = super::status::from_db(&args.db)?;
    let text = {
        let store = Store::open_read_only(&args.db)?;
        store
            .sweep()?
            .map(|s| s.spec_text)
            .with_context(|| format!("{} holds no sweep yet", args.db.display()))?
    };
    let results = query::load_results(&args.db)?;
    let fits = match query::load_fits(&args.db) {
        Ok((_, f)) => f,
        Err(query::QueryError::NoFits { .. }) => Vec::new(),
        Err(e) => return Err(e.into()),
    };
    let fig_dir = args.out.join("figures");
    std::fs::create_dir_all(&fig_dir)
        .with_context(|| format!("cannot create {}", fig_dir.display()))?;
    let mut figs = Figures {
        dir: fig_dir,
        count: 0,
    };
    let progress = indicatif::ProgressBar::new(8);
    progress.set_style(
        indicatif::ProgressStyle::with_template("{msg:<40} [{bar:30}] {pos}/{len}")
            .unwrap_or_else(|_| indicatif::ProgressStyle::default_bar()),
    );
    let step = |m: &str| {
        progress.set_message(m.to_string());
        progress.inc(1);
    };

    let box_words: Vec<String> = spec
        .params
        .iter()
        .map(|p| {
            with_unit(
                format!("{} {} to {}", p.name, short(p.lo), short(p.hi)),
                &p.unit,
            )
        })
        .collect();
    let mut cautions = vec![
        "Everything below except the observed points comes from the surrogates, statistical models fitted to the simulation runs: predictions are model outputs to be checked against experiments, not measurements.".to_string(),
        format!(
            "The surrogates say nothing outside the swept box ({}); do not read the curves beyond it.",
            box_words.join("; ")
        ),
    ];
    let mut page = Page {
        title: spec.name.clone(),
        subtitle: format!(
            "Sweep of the {} model: {} points, {} runs done, {} failed",
            spec.model.name, st.points, st.done, st.failed
        ),
        facts: vec![
            ("objective".into(), st.objective_label.clone()),
            ("strategy".into(), spec.strategy.as_str().into()),
            ("database".into(), args.db.display().to_string()),
        ],
        footer: format!(
            "Made by tessera {} on {} from {}.",
            env!("CARGO_PKG_VERSION"),
            humantime::format_rfc3339_seconds(std::time::SystemTime::now()),
            args.db.display()
        ),
        ..Default::default()
    };
    step("the sweep");
    page.sections.push(sweep_section(&spec, &st, &text));
    step("progress");
    page.sections
        .push(progress_section(&spec, &st, &results, &mut figs)?);
    page.sections.push(failures_section(&st));
    if fits.is_empty() {
        page.sections.push(Section {
            id: "trust".into(),
            title: "Surrogates".into(),
            intro: vec![format!(
                "No surrogate yet: fewer than {} points have finished runs.",
                tessera_coordinator::fitter::MIN_POINTS
            )],
            ..Default::default()
        });
    } else {
        step("leave-one-out checks");
        let trust = trust_section(&fits);
        for row in &trust.tables[0].rows {
            if row.get(5).is_some_and(|v| v == "needs more points") {
                cautions.push(format!(
                    "The surrogate of {} needs more points before it can be trusted (see \"Can the surrogates be trusted?\").",
                    row[0]
                ));
            }
        }
        page.sections.push(trust);
        let metrics: Vec<String> = metric_order(&spec, &fits)
            .into_iter()
            .take(args.max_metrics.max(1))
            .collect();
        // Which constants matter.
        step("sensitivity");
        let mut sens = Section {
            id: "sensitivity".into(),
            title: "Which constants matter".into(),
            intro: vec!["Sobol indices on the surrogates: the share of each metric's variance over the box caused by each constant alone (first order) and with its interactions (total), with 95% intervals.".into()],
            ..Default::default()
        };
        let mut all_sens = Vec::new();
        for m in &metrics {
            let s = query::sensitivity(&fits, &spec, Some(m), 1)?;
            for one in s {
                sens.figures.push(figs.add(
                    &super::sensitivity::figure(&one),
                    &format!("sensitivity-{}", one.metric),
                    format!("Sobol indices of {}", one.metric),
                    format!("bar chart of Sobol indices for {}", one.metric),
                )?);
                sens.notes.extend(super::sensitivity::reading(&one));
                all_sens.push(one);
            }
        }
        page.sections.push(sens);
        // Main effects.
        step("main effects");
        let mut eff = Section {
            id: "effects".into(),
            title: "How each metric moves with each constant".into(),
            intro: vec!["Main effects: each metric averaged over the other constants, with a 95% band for the surrogate's uncertainty. Dots are observed point means (the other constants vary between them). A green band is the measured target; grey shading marks where the surrogate knows little.".into()],
            ..Default::default()
        };
        let store = Store::open_read_only(&args.db)?;
        let sweep_id = store.sweep()?.map(|s| s.id).unwrap_or_default();
        let points = store.points(sweep_id)?;
        let evals = store.evaluations(sweep_id)?;
        drop(store);
        for m in &metrics {
            for p in &spec.params {
                let t = query::trend(
                    &fits,
                    &spec,
                    &points,
                    &evals,
                    &p.name,
                    m,
                    &Default::default(),
                    40,
                    TrendKind::MainEffect,
                    1,
                )?;
                eff.figures.push(figs.add(
                    &super::trend::curve_figure(&t, &spec),
                    &format!("{m}-vs-{}", p.name),
                    format!(
                        "{m} against {}{}",
                        p.name,
                        if p.scale == Scale::Log {
                            " (log axis)"
                        } else {
                            ""
                        }
                    ),
                    format!("main effect of {} on {m}", p.name),
                )?);
            }
        }
        page.sections.push(eff);
        // A map of the two constants that matter most for the first metric.
        step("map");
        if spec.dimension() >= 2 {
            if let Some(s) = all_sens.first() {
                let mut order: Vec<(usize, f64)> = s
                    .params
                    .iter()
                    .enumerate()
                    .map(|(i, (_, ix))| (i, ix.total.value))
                    .collect();
                order.sort_by(|a, b| b.1.total_cmp(&a.1));
                let (kx, ky) = (order[0].0, order[1].0);
                if let Some(fit) = fits.iter().find(|f| f.metric == s.metric) {
                    let m = effects::map(fit, &spec, kx, ky, 30, 1)?;
                    let (px, py) = (&spec.params[kx].name, &spec.params[ky].name);
                    let fig = chart::MapPlot {
                        title: format!("{} over {px} and {py}", s.metric),
                        x: super::trend::param_axis(&spec, px),
                        y: super::trend::param_axis(&spec, py),
                        xs: m.xs,
                        ys: m.ys,
                        mean: m.mean,
                        sd: m.sd,
                        metric: super::trend::label(&s.metric, &fit.unit),
                        observed: results
                            .iter()
                            .filter(|r| {
                                !r.replicates.is_empty() && r.values.len() == spec.dimension()
                            })
                            .map(|r| (r.values[kx], r.values[ky]))
                            .collect(),
                    };
                    page.sections.push(Section {
                        id: "map".into(),
                        title: "The two constants that matter most".into(),
                        intro: vec![format!(
                            "{} over {px} and {py}, the two constants with the largest total Sobol indices{}: mean with contour lines, and the surrogate's uncertainty beside it. Dots are the points run.",
                            s.metric,
                            if spec.dimension() > 2 { ", averaged over the others" } else { "" }
                        )],
                        figures: vec![figs.add(&fig, &format!("map-{}", s.metric), format!("{} over {px} and {py}", s.metric), "map of the mean and its sd".into())?],
                        ..Default::default()
                    });
                }
            }
        }
        // Calibration.
        step("calibration");
        if !spec.targets.is_empty() {
            match query::calibrate(&fits, &spec, &results, &CalibrateOptions::default()) {
                Ok(c) => page
                    .sections
                    .push(calibration_section(&c, &spec, &mut figs)?),
                Err(e) => page.sections.push(Section {
                    id: "calibration".into(),
                    title: "Calibration to the targets".into(),
                    intro: vec![format!("No calibration yet: {e}")],
                    ..Default::default()
                }),
            }
        }
    }
    page.sections.push(sweep_file_section(&text));
    page.cautions = cautions;
    step("writing");
    let html = html::render(&page)?;
    let index = args.out.join("index.html");
    std::fs::write(&index, html).with_context(|| format!("cannot write {}", index.display()))?;
    progress.finish_and_clear();
    println!("report: {}", index.display());
    println!("figures for slides: {}", args.out.join("figures").display());
    Ok(ExitCode::SUCCESS)
}

fn calibration_section(
    c: &query::Calibration,
    spec: &Spec,
    figs: &mut Figures,
) -> anyhow::Result<Section> {
    let mut s = Section {
        id: "calibration".into(),
        title: "Calibration to the targets".into(),
        ..Default::default()
    };
    s.intro.push(format!(
        "Constants not ruled out by the targets (combined implausibility at most {}): {:.1}% +- {:.1}% of the box.",
        c.region.cutoff,
        100.0 * c.region.fraction,
        100.0 * c.region.fraction_se
    ));
    s.tables.push(Table {
        caption: "Targets (measured values)".into(),
        header: vec![
            "metric".into(),
            "value".into(),
            "sd".into(),
            "model discrepancy sd".into(),
        ],
        rows: c
            .targets
            .iter()
            .map(|t| {
                vec![
                    t.metric.clone(),
                    with_unit(short(t.value), &t.unit),
                    short(t.sd),
                    short(t.discrepancy_sd),
                ]
            })
            .collect(),
    });
    s.tables.push(Table {
        caption: format!(
            "Posterior (uniform prior over the box; effective sample size {:.0}, R-hat {:.3})",
            c.diagnostics.ess, c.diagnostics.rhat
        ),
        header: vec![
            "parameter".into(),
            "mean".into(),
            "sd".into(),
            "5%".into(),
            "95%".into(),
            "region not ruled out".into(),
            "verdict".into(),
        ],
        rows: spec
            .params
            .iter()
            .filter_map(|p| {
                let m = c.posterior.get(&p.name)?;
                let f = c.findings.iter().find(|f| f.param == p.name)?;
                let region = c
                    .region
                    .bounds
                    .get(&p.name)
                    .map_or("none".to_string(), |[a, b]| {
                        format!("{} to {}", short(*a), short(*b))
                    });
                Some(vec![
                    with_unit(p.name.clone(), &p.unit),
                    short(m.mean),
                    short(m.sd),
                    short(m.q05),
                    short(m.q95),
                    region,
                    f.verdict.clone(),
                ])
            })
            .collect(),
    });
    s.notes.extend(c.findings.iter().map(|f| f.words.clone()));
    s.notes.extend(c.trade_offs.iter().cloned());
    s.notes.extend(c.diagnostics.warnings.iter().cloned());
    s.notes.extend(c.cautions.iter().cloned());
    let dir = figs.dir.join("calibration");
    let written = super::calibrate::plots(c, spec, &dir)?;
    for p in written {
        let text =
            std::fs::read_to_string(&p).with_context(|| format!("cannot read {}", p.display()))?;
        let name = p
            .file_stem()
            .map(|s| s.to_string_lossy().to_string())
            .unwrap_or_default();
        let caption = match name.as_str() {
            "posterior" => "Posterior of each constant (grey line: the prior)",
            "pairs" => "Posterior samples over the region not ruled out",
            _ => "Combined implausibility against each constant (line: the cutoff)",
        };
        let mut r = FigureRef::svg_text(&text, caption, format!("calibration figure: {name}"));
        r.png = Some(format!("figures/calibration/{name}.png"));
        s.figures.push(r);
    }
    Ok(s)
}
