//! The sweep-file rules: which keys exist, what each may hold, and how they
//! depend on each other. The typed access to the TOML document underneath
//! is [`super::toml_access`]; the extra rules for built-in models are
//! [`super::builtin`].
//!
//! The file is parsed with the `toml` crate into its spanned document tree
//! (`toml::de::DeTable`), which keeps the byte range of every key and value.
//! The tree is then walked by hand rather than through `#[derive(Deserialize)]`,
//! because serde stops at the first problem while users need every problem at
//! once, each with its line, column and key.

use std::collections::{BTreeMap, BTreeSet};
use std::time::Duration;

use toml::de::{DeTable, DeValue};
use toml::Spanned;

use super::error::LineIndex;
use super::toml_access::{closest, join, num, table_start, type_name, Reader, Value};
use super::{
    Direction, FitScale, MetricBounds, ModelSpec, Objective, ParamSpec, Scale, Spec, SpecError,
    SpecErrors, StopRule, Strategy, Target, MIN_DESIGN_PER_PARAM,
};

const TOP_KEYS: &[&str] = &[
    "name",
    "description",
    "seed",
    "budget",
    "initial",
    "replicates",
    "batch",
    "strategy",
    "retries",
    "model",
    "params",
    "objective",
    "target",
    "metrics",
    "reproducible",
    "stop",
];
const STOP_KEYS: &[&str] = &["expected_improvement_below", "for_rounds"];
const MODEL_KEYS: &[&str] = &["name", "timeout", "command", "fixed"];
const PARAM_KEYS: &[&str] = &["range", "scale", "integer", "unit", "description"];
const OBJECTIVE_KEYS: &[&str] = &["minimize", "maximize"];
const TARGET_KEYS: &[&str] = &["metric", "value", "sd", "discrepancy_sd", "weight", "unit"];
const METRIC_KEYS: &[&str] = &["unit", "description", "bounds", "transform"];

/// Default `retries`.
const DEFAULT_RETRIES: u32 = 2;
/// Default `model.timeout`.
const DEFAULT_TIMEOUT: Duration = Duration::from_secs(3600);
/// Default `initial` per parameter (common practice, no source: the
/// "10 x dimension" rule of thumb for initial GP designs).
const INITIAL_PER_PARAM: u32 = 10;
/// Largest accepted `replicates` and `retries` (a guard against typos).
const MAX_REPEATS: i64 = 10_000;

/// Most points a sweep may have: the surrogates hold at most this many
/// (`tessera_surrogate::gp::MAX_OBSERVATIONS`).
pub(super) const MAX_BUDGET: u32 = tessera_surrogate::gp::MAX_OBSERVATIONS as u32;

pub(super) fn read(text: &str, file: &str) -> Result<(Spec, Vec<SpecError>), SpecErrors> {
    let mut r = Reader {
        file,
        lines: LineIndex::new(text),
        errors: Vec::new(),
        warnings: Vec::new(),
    };
    let (root, syntax) = DeTable::parse_recoverable(text);
    if !syntax.is_empty() {
        let mut last = String::new();
        for e in syntax {
            let at = e.span().map_or(0, |s| s.start);
            let message = e.message().trim().to_string();
            // One mistake (a table given twice) can be reported at each of its keys.
            if message == last {
                continue;
            }
            let hint = if message == "duplicate key" {
                " (this key or table is already given above; each may appear once)"
            } else {
                ""
            };
            r.error(at, "", format!("not valid TOML: {message}{hint}"));
            last = message;
        }
        return Err(r.finish());
    }
    let mut spec = r.spec(root.get_ref());
    if let Some(s) = spec.as_mut() {
        if s.model.command.is_none() {
            if let Some(model) = tessera_models::find(&s.model.name) {
                super::builtin::apply(&mut r, root.get_ref(), s, &model);
            }
        }
    }
    match spec {
        Some(spec) if r.errors.is_empty() => Ok((spec, r.take_warnings())),
        _ => {
            if r.errors.is_empty() {
                // Every path that gives up reports why; this is a safety net.
                r.error(
                    0,
                    "",
                    "the sweep file could not be read (no details available)",
                );
            }
            Err(r.finish())
        }
    }
}

/// A name usable as a CSV column and model input: a letter or `_`, then letters, digits or `_`.
fn valid_name(name: &str) -> bool {
    let mut chars = name.chars();
    matches!(chars.next(), Some(c) if c.is_ascii_alphabetic() || c == '_')
        && chars.all(|c| c.is_ascii_alphanumeric() || c == '_')
}

const NAME_RULE: &str =
    "names start with a letter or `_` and hold only letters, digits and `_` (e.g. height_mean)";

impl Reader<'_> {
    fn spec(&mut self, root: &DeTable<'_>) -> Option<Spec> {
        self.check_keys(root, "", TOP_KEYS);

        let name = match Self::lookup(root, "name") {
            Some((_, v)) => self.nonempty_string(v, "name", "\"height-spread\""),
            None => {
                self.error(
                    0,
                    "name",
                    "missing: give the sweep a short name, e.g. name = \"height-spread\"",
                );
                None
            }
        };
        let description = match Self::lookup(root, "description") {
            Some((_, v)) => self.string(v, "description", "\"what this sweep is for\""),
            None => Some(String::new()),
        };
        let seed = match Self::lookup(root, "seed") {
            Some((_, v)) => self
                .whole(
                    v,
                    "seed",
                    0,
                    i64::MAX,
                    "it fixes the design and every replicate seed",
                )
                .map(|s| s as u64),
            None => Some(0),
        };
        let budget = match Self::lookup(root, "budget") {
            Some((_, v)) => self
                .whole(
                    v,
                    "budget",
                    1,
                    i64::from(MAX_BUDGET),
                    "points to evaluate in total; the surrogates hold at most this many, so split a larger study into several sweeps",
                )
                .map(|b| (b as u32, v.span().start)),
            None => {
                self.error(
                    0,
                    "budget",
                    "missing: how many points to evaluate in total, e.g. budget = 60",
                );
                None
            }
        };
        let initial = match Self::lookup(root, "initial") {
            Some((_, v)) => self
                .whole(
                    v,
                    "initial",
                    1,
                    i64::from(MAX_BUDGET),
                    "points in the initial design, at most the budget",
                )
                .map(|i| Some((i as u32, v.span().start))),
            None => Some(None),
        };
        let replicates = self.opt_count(root, "replicates", 1, 1, "runs per point");
        let retries = self.opt_count(
            root,
            "retries",
            DEFAULT_RETRIES,
            0,
            "re-runs of a failed evaluation",
        );
        let batch = match Self::lookup(root, "batch") {
            Some((_, v)) => self
                .whole(v, "batch", 1, u32::MAX as i64, "points proposed at once")
                .map(|b| Some(b as u32)),
            None => Some(None),
        };
        let strategy_at = Self::lookup(root, "strategy").map(|(_, v)| v.span().start);
        let strategy = match Self::lookup(root, "strategy") {
            Some((_, v)) => self.strategy(v).map(Some),
            None => Some(None),
        };
        let reproducible = match Self::lookup(root, "reproducible") {
            Some((_, v)) => self.boolean(v, "reproducible").map(Some),
            None => Some(None),
        };
        let stop = match Self::lookup(root, "stop") {
            Some((k, v)) => self.stop(k.span().start, v).map(Some),
            None => Some(None),
        };

        let fixed_names: BTreeSet<String> = Self::lookup(root, "model")
            .and_then(|(_, m)| match m.get_ref() {
                DeValue::Table(t) => t.get("fixed"),
                _ => None,
            })
            .and_then(|f| match f.get_ref() {
                DeValue::Table(t) => Some(t.keys().map(|k| k.get_ref().to_string()).collect()),
                _ => None,
            })
            .unwrap_or_default();

        let model = match Self::lookup(root, "model") {
            Some((k, v)) => self.model(k.span().start, v),
            None => {
                self.error(
                    0,
                    "model",
                    "missing: add a [model] table with name = \"...\" (a built-in model such as \"tiling\", or a name your workers run)",
                );
                None
            }
        };
        let params = match Self::lookup(root, "params") {
            Some((k, v)) => self.params(k.span().start, v, &fixed_names),
            None => {
                self.error(
                    0,
                    "params",
                    "no parameters to sweep: add at least one [params.NAME] table with range = [low, high]",
                );
                None
            }
        };
        let objective = match Self::lookup(root, "objective") {
            Some((k, v)) => self.objective(k.span().start, v).map(Some),
            None => Some(None),
        };
        let mut metric_units = BTreeMap::new();
        let mut metric_bounds = BTreeMap::new();
        let metrics_ok = match Self::lookup(root, "metrics") {
            Some((_, v)) => self.metrics(v, &mut metric_units, &mut metric_bounds),
            None => true,
        };
        let targets = match Self::lookup(root, "target") {
            Some((_, v)) => self.targets(v, &mut metric_units),
            None => Some(Vec::new()),
        };
        if let (Some(None), Some(t)) = (&objective, &targets) {
            if t.is_empty() {
                self.error(
                    0,
                    "objective",
                    "nothing to optimise: add [objective] with minimize = \"METRIC\" or maximize = \"METRIC\", or add [[target]] tables (metric, value, sd) to calibrate against data",
                );
            }
        }

        let params = params?;
        let (budget, _) = budget?;
        let mut initial_at = None;
        let initial = match initial? {
            Some((i, at)) => {
                initial_at = Some(at);
                if i > budget {
                    self.error(
                        at,
                        "initial",
                        format!(
                            "the initial design ({i} points) is larger than the budget ({budget} points); use initial <= {budget} or raise budget"
                        ),
                    );
                }
                i
            }
            None => (INITIAL_PER_PARAM.saturating_mul(params.len() as u32)).clamp(1, budget),
        };
        if !metrics_ok {
            return None;
        }
        let has_targets = targets.as_ref().is_some_and(|t| !t.is_empty());
        let has_objective = matches!(objective, Some(Some(_)));
        let strategy = match strategy? {
            Some(Strategy::Calibrate) if !has_targets => {
                self.error(
                    strategy_at.unwrap_or(0),
                    "strategy",
                    "\"calibrate\" needs measurements to match: add [[target]] tables (metric, value, sd)",
                );
                return None;
            }
            Some(s) => s,
            // Measurements and nothing to optimise: find the constants that match them.
            None if has_targets && !has_objective => Strategy::Calibrate,
            None => Strategy::Improve,
        };
        let d = params.len() as u32;
        if let Some(at) = initial_at {
            let enough = MIN_DESIGN_PER_PARAM.saturating_mul(d);
            if strategy == Strategy::Improve && d >= 2 && initial < enough && initial < budget {
                self.warning(
                    at,
                    "initial",
                    format!(
                        "{initial} initial points for {d} parameters: with fewer than {MIN_DESIGN_PER_PARAM} per parameter a surrogate can miss a parameter that matters only elsewhere in the box, so the search first adds {} space-filling points, and it still often settles in a local optimum (docs/benchmarks.md); consider initial = {enough} or more, so that the Latin hypercube holds them",
                        enough.min(budget) - initial
                    ),
                );
            }
        }
        Some(Spec {
            name: name?,
            description: description?,
            seed: seed?,
            budget,
            initial,
            replicates: replicates?,
            batch: batch?,
            strategy,
            retries: retries?,
            reproducible: reproducible?,
            stop: stop?,
            model: model?,
            params,
            objective: objective?,
            targets: targets?,
            metric_units,
            metric_bounds,
        })
    }

    fn opt_count(
        &mut self,
        root: &DeTable<'_>,
        key: &str,
        default: u32,
        min: i64,
        what: &str,
    ) -> Option<u32> {
        match Self::lookup(root, key) {
            Some((_, v)) => self.whole(v, key, min, MAX_REPEATS, what).map(|n| n as u32),
            None => Some(default),
        }
    }

    fn stop(&mut self, key_at: usize, v: &Value<'_>) -> Option<StopRule> {
        let t = self.table(v, "stop", "[stop]")?;
        self.check_keys(t, "stop", STOP_KEYS);
        let below = match Self::lookup(t, "expected_improvement_below") {
            Some((_, bv)) => match self.number(bv, "stop.expected_improvement_below") {
                Some(x) if x > 0.0 => Some(x),
                Some(x) => {
                    self.error(
                        bv.span().start,
                        "stop.expected_improvement_below",
                        format!(
                            "must be above zero (in the objective's unit); found {}",
                            num(x)
                        ),
                    );
                    None
                }
                None => None,
            },
            None => {
                self.error(
                    table_start(v, key_at),
                    "stop.expected_improvement_below",
                    "missing: stop when the largest expected improvement stays below this value, in the objective's unit, e.g. expected_improvement_below = 0.001",
                );
                None
            }
        };
        let rounds = match Self::lookup(t, "for_rounds") {
            Some((_, rv)) => self
                .whole(rv, "stop.for_rounds", 1, 1000, "planning rounds in a row")
                .map(|r| r as u32),
            None => Some(3),
        };
        Some(StopRule {
            improvement_below: below?,
            rounds: rounds?,
        })
    }

    fn strategy(&mut self, v: &Value<'_>) -> Option<Strategy> {
        let s = self.string(v, "strategy", "\"improve\"")?;
        match s.as_str() {
            "improve" => Some(Strategy::Improve),
            "explore" => Some(Strategy::Explore),
            "calibrate" => Some(Strategy::Calibrate),
            other => {
                let hint = closest(other, &["improve", "explore", "calibrate"])
                    .map(|c| format!("did you mean \"{c}\"? "))
                    .unwrap_or_default();
                self.error(
                    v.span().start,
                    "strategy",
                    format!(
                        "unknown strategy \"{other}\"; {hint}valid: \"improve\" (search for the best objective by expected improvement), \"explore\" (map trends where the surrogate is least certain) or \"calibrate\" (narrow down the constants that match the [[target]] measurements)"
                    ),
                );
                None
            }
        }
    }

    fn model(&mut self, key_at: usize, v: &Value<'_>) -> Option<ModelSpec> {
        let t = self.table(v, "model", "[model]")?;
        let at = table_start(v, key_at);
        self.check_keys(t, "model", MODEL_KEYS);
        let name = match Self::lookup(t, "name") {
            Some((_, v)) => self.nonempty_string(v, "model.name", "\"tiling\""),
            None => {
                self.error(
                    at,
                    "model.name",
                    "missing: which model to run, e.g. name = \"tiling\" (a built-in model) or a name your workers map to a command",
                );
                None
            }
        };
        let timeout = match Self::lookup(t, "timeout") {
            Some((_, v)) => self.duration(v, "model.timeout"),
            None => Some(DEFAULT_TIMEOUT),
        };
        let command = match Self::lookup(t, "command") {
            Some((_, v)) => self.command(v).map(Some),
            None => Some(None),
        };
        let fixed = match Self::lookup(t, "fixed") {
            Some((_, v)) => self.fixed(v),
            None => Some(BTreeMap::new()),
        };
        Some(ModelSpec {
            name: name?,
            timeout: timeout?,
            command: command?,
            fixed: fixed?,
        })
    }

    fn command(&mut self, v: &Value<'_>) -> Option<Vec<String>> {
        const EX: &str = "e.g. command = [\"python3\", \"sim.py\"]";
        let at = v.span().start;
        let DeValue::Array(items) = v.get_ref() else {
            let found = type_name(v.get_ref());
            self.error(
                at,
                "model.command",
                format!("expected a list of words, the program first, {EX}; found {found}"),
            );
            return None;
        };
        let mut out = Vec::new();
        let mut ok = true;
        for (i, item) in items.iter().enumerate() {
            match item.get_ref() {
                DeValue::String(s) => out.push(s.to_string()),
                other => {
                    ok = false;
                    let found = type_name(other);
                    self.error(
                        item.span().start,
                        &format!("model.command[{}]", i + 1),
                        format!(
                            "every word of the command must be text in quotes, {EX}; found {found}"
                        ),
                    );
                }
            }
        }
        if ok && out.first().is_none_or(|p| p.trim().is_empty()) {
            self.error(at, "model.command", format!("must name a program, {EX}"));
            return None;
        }
        ok.then_some(out)
    }

    fn fixed(&mut self, v: &Value<'_>) -> Option<BTreeMap<String, serde_json::Value>> {
        let t = self.table(v, "model.fixed", "[model.fixed]")?;
        let mut out = BTreeMap::new();
        let mut ok = true;
        for (k, val) in t.iter() {
            let name: &str = k.get_ref();
            let key = join("model.fixed", name);
            if !valid_name(name) {
                self.error(
                    k.span().start,
                    &key,
                    format!("not a valid input name; {NAME_RULE}"),
                );
                ok = false;
                continue;
            }
            match self.json(val, &key) {
                Some(j) => {
                    out.insert(name.to_string(), j);
                }
                None => ok = false,
            }
        }
        ok.then_some(out)
    }

    fn params(
        &mut self,
        key_at: usize,
        v: &Value<'_>,
        fixed: &BTreeSet<String>,
    ) -> Option<Vec<ParamSpec>> {
        let t = self.table(v, "params", "[params.NAME]")?;
        // The document map is sorted by name; the order that counts is the order in the file.
        let mut entries: Vec<_> = t.iter().collect();
        entries.sort_by_key(|(k, _)| k.span().start);
        let mut out = Vec::new();
        let mut ok = true;
        for (k, pv) in entries {
            match self.param(k, pv, fixed) {
                Some(p) => out.push(p),
                None => ok = false,
            }
        }
        if ok && out.is_empty() {
            self.error(
                key_at,
                "params",
                "no parameters to sweep: add at least one [params.NAME] table with range = [low, high]",
            );
            return None;
        }
        ok.then_some(out)
    }

    fn param(
        &mut self,
        k: &Spanned<std::borrow::Cow<'_, str>>,
        v: &Value<'_>,
        fixed: &BTreeSet<String>,
    ) -> Option<ParamSpec> {
        let name: &str = k.get_ref();
        let path = join("params", name);
        let key_at = k.span().start;
        let mut ok = true;
        if !valid_name(name) {
            self.error(
                key_at,
                &path,
                format!("not a valid parameter name; {NAME_RULE}"),
            );
            ok = false;
        }
        if fixed.contains(name) {
            self.error(
                key_at,
                &path,
                format!("`{name}` is also given in [model.fixed]; an input is either swept here or fixed there, not both"),
            );
            ok = false;
        }
        let t = self.table(v, &path, &format!("[params.{name}]"))?;
        self.check_keys(t, &path, PARAM_KEYS);
        let integer = match Self::lookup(t, "integer") {
            Some((_, v)) => self.boolean(v, &join(&path, "integer")),
            None => Some(false),
        };
        let scale = match Self::lookup(t, "scale") {
            Some((_, v)) => {
                let key = join(&path, "scale");
                match self.string(v, &key, "\"log\"")?.as_str() {
                    "linear" => Some(Scale::Linear),
                    "log" => Some(Scale::Log),
                    other => {
                        let hint = closest(other, &["linear", "log"])
                            .map(|c| format!("did you mean \"{c}\"? "))
                            .unwrap_or_default();
                        self.error(
                            v.span().start,
                            &key,
                            format!("unknown scale \"{other}\"; {hint}valid: \"linear\" (the default) or \"log\" (for ranges spanning orders of magnitude)"),
                        );
                        None
                    }
                }
            }
            None => Some(Scale::Linear),
        };
        let unit = match Self::lookup(t, "unit") {
            Some((_, v)) => self.string(v, &join(&path, "unit"), "\"um\""),
            None => Some(String::new()),
        };
        let description = match Self::lookup(t, "description") {
            Some((_, v)) => self.string(v, &join(&path, "description"), "\"mean cell height\""),
            None => Some(String::new()),
        };
        let range = match Self::lookup(t, "range") {
            Some((_, rv)) => self.range(rv, &join(&path, "range"), integer.unwrap_or(false), scale),
            None => {
                self.error(
                    table_start(v, key_at),
                    &join(&path, "range"),
                    "missing: give the lowest and highest value, e.g. range = [20.0, 60.0]",
                );
                None
            }
        };
        let (lo, hi) = range?;
        if !ok {
            return None;
        }
        Some(ParamSpec {
            name: name.to_string(),
            lo,
            hi,
            scale: scale?,
            integer: integer?,
            unit: unit?,
            description: description?,
        })
    }

    fn range(
        &mut self,
        v: &Value<'_>,
        key: &str,
        integer: bool,
        scale: Option<Scale>,
    ) -> Option<(f64, f64)> {
        let at = v.span().start;
        let items = match v.get_ref() {
            DeValue::Array(items) if items.len() == 2 => items,
            DeValue::Array(items) => {
                self.error(
                    at,
                    key,
                    format!("expected two numbers [low, high], e.g. range = [20.0, 60.0]; found a list of {}", items.len()),
                );
                return None;
            }
            other => {
                let found = type_name(other);
                self.error(
                    at,
                    key,
                    format!("expected two numbers [low, high], e.g. range = [20.0, 60.0]; found {found}"),
                );
                return None;
            }
        };
        let lo = self.number(&items[0], key);
        let hi = self.number(&items[1], key);
        let (lo, hi) = (lo?, hi?);
        let mut ok = true;
        if lo == hi {
            self.error(
                at,
                key,
                format!("empty range: low and high are both {}; give low < high, or put a constant input under [model.fixed]", num(lo)),
            );
            ok = false;
        } else if lo > hi {
            self.error(
                at,
                key,
                format!(
                    "reversed range: low {} is above high {}; write range = [{}, {}]",
                    num(lo),
                    num(hi),
                    num(hi),
                    num(lo)
                ),
            );
            ok = false;
        } else if !(hi - lo).is_finite() || (hi - lo) < (hi.abs().max(lo.abs())) * 1e-12 {
            self.error(
                at,
                key,
                format!(
                    "range [{}, {}] cannot be sampled: its width {} is {}; give bounds whose difference is a finite number well above the rounding of the bounds themselves",
                    num(lo),
                    num(hi),
                    num(hi - lo),
                    if (hi - lo).is_finite() { "lost in rounding" } else { "too large to represent" }
                ),
            );
            ok = false;
        }
        if integer && (lo.abs() > 1e15 || hi.abs() > 1e15) {
            self.error(
                at,
                key,
                "integer = true needs bounds within +-10^15 (whole numbers beyond that are not exact)",
            );
            ok = false;
        }
        if integer {
            for (x, item) in [(lo, &items[0]), (hi, &items[1])] {
                if x.fract() != 0.0 {
                    self.error(
                        item.span().start,
                        key,
                        format!("integer = true needs whole-number bounds; {} is not whole (use e.g. {})", num(x), num(x.round())),
                    );
                    ok = false;
                }
            }
        }
        if scale == Some(Scale::Log) && lo.min(hi) <= 0.0 {
            self.error(
                at,
                key,
                format!("scale = \"log\" needs a range above zero; {} is not; raise the low end or use scale = \"linear\"", num(lo.min(hi))),
            );
            ok = false;
        }
        ok.then_some((lo, hi))
    }

    fn objective(&mut self, key_at: usize, v: &Value<'_>) -> Option<Objective> {
        let t = self.table(v, "objective", "[objective]")?;
        self.check_keys(t, "objective", OBJECTIVE_KEYS);
        let min = Self::lookup(t, "minimize");
        let max = Self::lookup(t, "maximize");
        match (min, max) {
            (Some(_), Some((mk, _))) => {
                self.error(
                    mk.span().start,
                    "objective.maximize",
                    "give either minimize or maximize, not both (to match observed values, use [[target]] tables instead)",
                );
                None
            }
            (Some((_, v)), None) => {
                let metric = self.metric_name(v, "objective.minimize")?;
                Some(Objective {
                    metric,
                    direction: Direction::Minimize,
                })
            }
            (None, Some((_, v))) => {
                let metric = self.metric_name(v, "objective.maximize")?;
                Some(Objective {
                    metric,
                    direction: Direction::Maximize,
                })
            }
            (None, None) => {
                self.error(
                    table_start(v, key_at),
                    "objective",
                    "empty: give minimize = \"METRIC\" or maximize = \"METRIC\", or remove [objective] and give [[target]] tables",
                );
                None
            }
        }
    }

    fn metric_name(&mut self, v: &Value<'_>, key: &str) -> Option<String> {
        let s = self.nonempty_string(v, key, "\"territory_cv\"")?;
        if !valid_name(&s) {
            self.error(
                v.span().start,
                key,
                format!("\"{s}\" is not a valid metric name; {NAME_RULE}"),
            );
            return None;
        }
        Some(s)
    }

    /// An optional number `>= 0` in table `t` (at `path`), `default` if absent.
    fn non_negative(
        &mut self,
        t: &DeTable<'_>,
        path: &str,
        key: &str,
        default: f64,
        example: &str,
    ) -> Option<f64> {
        let Some((_, v)) = Self::lookup(t, key) else {
            return Some(default);
        };
        let full = join(path, key);
        match self.number(v, &full) {
            Some(x) if x >= 0.0 => Some(x),
            Some(x) => {
                self.error(
                    v.span().start,
                    &full,
                    format!("must be zero or above ({example}); found {}", num(x)),
                );
                None
            }
            None => None,
        }
    }

    fn metrics(
        &mut self,
        v: &Value<'_>,
        units: &mut BTreeMap<String, String>,
        bounds: &mut BTreeMap<String, MetricBounds>,
    ) -> bool {
        let Some(t) = self.table(v, "metrics", "[metrics.NAME]") else {
            return false;
        };
        let mut ok = true;
        for (k, mv) in t.iter() {
            let name: &str = k.get_ref();
            let path = join("metrics", name);
            if !valid_name(name) {
                self.error(
                    k.span().start,
                    &path,
                    format!("not a valid metric name; {NAME_RULE}"),
                );
                ok = false;
            }
            let Some(mt) = self.table(mv, &path, &format!("[metrics.{name}]")) else {
                ok = false;
                continue;
            };
            self.check_keys(mt, &path, METRIC_KEYS);
            if let Some((_, dv)) = Self::lookup(mt, "description") {
                ok &= self
                    .string(dv, &join(&path, "description"), "\"what it measures\"")
                    .is_some();
            }
            if let Some((_, uv)) = Self::lookup(mt, "unit") {
                match self.string(uv, &join(&path, "unit"), "\"um^3\"") {
                    Some(u) => {
                        units.insert(name.to_string(), u);
                    }
                    None => ok = false,
                }
            }
            let given = match Self::lookup(mt, "bounds") {
                Some((_, bv)) => match self.bounds(bv, &join(&path, "bounds")) {
                    Some(b) => Some(b),
                    None => {
                        ok = false;
                        continue;
                    }
                },
                None => None,
            };
            let fit = match Self::lookup(mt, "transform") {
                Some((_, tv)) => match self.fit_scale(tv, &join(&path, "transform"), given) {
                    Some(f) => f,
                    None => {
                        ok = false;
                        continue;
                    }
                },
                None => FitScale::Auto,
            };
            if given.is_some() || fit != FitScale::Auto {
                let [lo, hi] = given.unwrap_or([None, None]);
                bounds.insert(name.to_string(), MetricBounds { lo, hi, fit });
            }
        }
        ok
    }

    /// `bounds = [lo, hi]`, with `-inf` / `inf` for an open side.
    fn bounds(&mut self, v: &Value<'_>, key: &str) -> Option<[Option<f64>; 2]> {
        let at = v.span().start;
        let example =
            "e.g. bounds = [0, 1] for a fraction, bounds = [0, inf] for a count or a volume";
        let items = match v.get_ref() {
            DeValue::Array(items) if items.len() == 2 => items,
            other => {
                let found = match other {
                    DeValue::Array(items) => format!("a list of {}", items.len()),
                    o => type_name(o).to_string(),
                };
                self.error(
                    at,
                    key,
                    format!("expected two numbers [low, high], {example}; found {found}"),
                );
                return None;
            }
        };
        let mut side = |item: &Value<'_>, open: f64| -> Option<Option<f64>> {
            match super::toml_access::parse_float(item.get_ref()) {
                Some(x) if x.is_finite() => Some(Some(x)),
                Some(x) if x == open => Some(None),
                Some(x) => {
                    self.error(
                        item.span().start,
                        key,
                        format!("{} cannot be a bound here; {example}", num(x)),
                    );
                    None
                }
                None => {
                    let found = type_name(item.get_ref());
                    self.error(
                        item.span().start,
                        key,
                        format!("expected a number; {example}; found {found}"),
                    );
                    None
                }
            }
        };
        let lo = side(&items[0], f64::NEG_INFINITY);
        let hi = side(&items[1], f64::INFINITY);
        let (lo, hi) = (lo?, hi?);
        if let (Some(l), Some(h)) = (lo, hi) {
            if l >= h {
                self.error(
                    at,
                    key,
                    format!(
                        "low bound {} is not below high bound {}; {example}",
                        num(l),
                        num(h)
                    ),
                );
                return None;
            }
        }
        Some([lo, hi])
    }

    /// `transform = "auto" | "none" | "log" | "logit"`, checked against the bounds.
    fn fit_scale(
        &mut self,
        v: &Value<'_>,
        key: &str,
        bounds: Option<[Option<f64>; 2]>,
    ) -> Option<FitScale> {
        let s = self.string(v, key, "\"logit\"")?;
        let [lo, hi] = bounds.unwrap_or([None, None]);
        let fit = match s.as_str() {
            "auto" => FitScale::Auto,
            "none" => FitScale::Natural,
            "log" => FitScale::Log,
            "logit" => FitScale::Logit,
            other => {
                let hint = closest(other, &["auto", "none", "log", "logit"])
                    .map(|c| format!("did you mean \"{c}\"? "))
                    .unwrap_or_default();
                self.error(
                    v.span().start,
                    key,
                    format!("unknown transform \"{other}\"; {hint}valid: \"auto\" (chosen by bounds), \"none\", \"log\" (one bound, 0 if none is given) or \"logit\" (two bounds)"),
                );
                return None;
            }
        };
        match (fit, lo, hi) {
            (FitScale::Logit, Some(_), Some(_)) => Some(fit),
            (FitScale::Logit, _, _) => {
                self.error(
                    v.span().start,
                    key,
                    "\"logit\" needs two finite bounds: add bounds = [low, high] (e.g. [0, 1] for a fraction)",
                );
                None
            }
            (FitScale::Log, Some(_), Some(_)) => {
                self.error(
                    v.span().start,
                    key,
                    "\"log\" is for a metric bounded on one side; with two finite bounds use \"logit\" or \"auto\"",
                );
                None
            }
            _ => Some(fit),
        }
    }

    fn targets(
        &mut self,
        v: &Value<'_>,
        units: &mut BTreeMap<String, String>,
    ) -> Option<Vec<Target>> {
        let at = v.span().start;
        let items: Vec<&Value<'_>> = match v.get_ref() {
            DeValue::Array(items) => items.iter().collect(),
            other => {
                let found = type_name(other);
                self.error(
                    at,
                    "target",
                    format!("expected one [[target]] table (double brackets) per observed metric; found {found}"),
                );
                return None;
            }
        };
        let mut out = Vec::new();
        let mut seen: BTreeMap<String, usize> = BTreeMap::new();
        let mut ok = true;
        for (i, item) in items.into_iter().enumerate() {
            let path = format!("target[{}]", i + 1);
            let Some(t) = self.table(item, &path, "[[target]]") else {
                ok = false;
                continue;
            };
            let item_at = item.span().start;
            self.check_keys(t, &path, TARGET_KEYS);
            let metric = match Self::lookup(t, "metric") {
                Some((_, mv)) => {
                    let m = self.metric_name(mv, &join(&path, "metric"));
                    if let Some(m) = &m {
                        if let Some(&first) = seen.get(m) {
                            let line = self.line_of(first);
                            self.error(
                                mv.span().start,
                                &join(&path, "metric"),
                                format!("a target for `{m}` is already given on line {line}; give each metric one target"),
                            );
                            ok = false;
                        } else {
                            seen.insert(m.clone(), mv.span().start);
                        }
                    }
                    m
                }
                None => {
                    self.error(
                        item_at,
                        &join(&path, "metric"),
                        "missing: which metric was observed, e.g. metric = \"coverage\"",
                    );
                    None
                }
            };
            let value = match Self::lookup(t, "value") {
                Some((_, vv)) => self.number(vv, &join(&path, "value")),
                None => {
                    self.error(
                        item_at,
                        &join(&path, "value"),
                        "missing: the observed value, e.g. value = 0.82",
                    );
                    None
                }
            };
            let sd = match Self::lookup(t, "sd") {
                Some((_, sv)) => {
                    let key = join(&path, "sd");
                    match self.number(sv, &key) {
                        Some(sd) if sd > 0.0 => Some(sd),
                        Some(sd) => {
                            self.error(
                                sv.span().start,
                                &key,
                                format!("must be above zero (the standard deviation of the observation); found {}", num(sd)),
                            );
                            None
                        }
                        None => None,
                    }
                }
                None => {
                    self.error(
                        item_at,
                        &join(&path, "sd"),
                        "missing: the standard deviation of the observation, e.g. sd = 0.04",
                    );
                    None
                }
            };
            if let Some((_, uv)) = Self::lookup(t, "unit") {
                let key = join(&path, "unit");
                match (self.string(uv, &key, "\"um\""), &metric) {
                    (Some(u), Some(m)) => match units.get(m) {
                        Some(prev) if *prev != u => {
                            self.error(
                                uv.span().start,
                                &key,
                                format!("unit \"{u}\" differs from the unit \"{prev}\" given in [metrics.{m}]; give one unit per metric"),
                            );
                            ok = false;
                        }
                        _ => {
                            units.insert(m.clone(), u);
                        }
                    },
                    (None, _) => ok = false,
                    _ => {}
                }
            }
            let discrepancy_sd = self.non_negative(
                t,
                &path,
                "discrepancy_sd",
                0.0,
                "the sd of the model discrepancy, e.g. discrepancy_sd = 0.02",
            );
            let weight = self.non_negative(t, &path, "weight", 1.0, "a weight, e.g. weight = 0.5");
            match (metric, value, sd, discrepancy_sd, weight) {
                (Some(metric), Some(value), Some(sd), Some(discrepancy_sd), Some(weight)) => out
                    .push(Target {
                        metric,
                        value,
                        sd,
                        discrepancy_sd,
                        weight,
                    }),
                _ => ok = false,
            }
        }
        ok.then_some(out)
    }
}
