//! Sweep-file rules that hold only for the built-in models, whose inputs and
//! metrics are known in advance (`tessera-models` describes them).
//!
//! For a sweep of a built-in model (no `command` of its own), a parameter or
//! fixed input the model does not take, a range beyond what the model
//! accepts, or an objective or target metric it does not report would fail
//! every run; each is an error with its line, column and a "did you mean".
//! Units the sweep file leaves out are taken from the model's description.
//! A box that crosses one of the model's documented limits (a combination
//! of inputs beyond which it measures something else) is a warning.

use toml::de::{DeTable, DeValue};

use super::toml_access::{closest, join, Reader, Value};
use super::{ParamSpec, Spec};
use tessera_models::{Limit, ModelInfo};

/// Most corners of the swept box evaluated for one limit (2^12).
const MAX_LIMIT_CORNERS: usize = 1 << 12;

/// The table under `key` of `t`, if it is one.
fn sub<'t, 'i>(t: &'t DeTable<'i>, key: &str) -> Option<&'t DeTable<'i>> {
    match t.get(key).map(|v| v.get_ref()) {
        Some(DeValue::Table(s)) => Some(s),
        _ => None,
    }
}

/// Byte offset of key `key` in table `t` (or `fallback`).
fn key_at(t: Option<&DeTable<'_>>, key: &str, fallback: usize) -> usize {
    t.and_then(|t| t.get_key_value(key))
        .map_or(fallback, |(k, _)| k.span().start)
}

/// Byte offset of the value under `key` in table `t` (or `fallback`).
fn value_at(t: Option<&DeTable<'_>>, key: &str, fallback: usize) -> usize {
    t.and_then(|t| t.get(key))
        .map_or(fallback, |v: &Value<'_>| v.span().start)
}

fn did_you_mean(word: &str, known: &[&str]) -> String {
    closest(word, known)
        .map(|c| format!("did you mean `{c}`? "))
        .unwrap_or_default()
}

fn with_unit(x: f64, unit: &str) -> String {
    tessera_models::text::with_unit(tessera_models::text::exact(x), unit)
}

/// Applies the rules of built-in model `model` to `spec`, recording errors
/// and warnings on `r` and filling in units the file leaves out.
pub(super) fn apply(r: &mut Reader<'_>, root: &DeTable<'_>, spec: &mut Spec, model: &ModelInfo) {
    let inputs: Vec<&str> = model.inputs.iter().map(|i| i.name).collect();
    let input_list = inputs.join(", ");
    let params_t = sub(root, "params");
    for p in &mut spec.params {
        let path = join("params", &p.name);
        let at = key_at(params_t, &p.name, 0);
        let Some(info) = model.input(&p.name) else {
            r.error(
                at,
                &path,
                format!(
                    "model {} has no input `{}`; {}its inputs: {input_list}",
                    model.name,
                    p.name,
                    did_you_mean(&p.name, &inputs)
                ),
            );
            continue;
        };
        let table = params_t.and_then(|t| sub(t, &p.name));
        let range_at = value_at(table, "range", at);
        if p.lo < info.lo || p.hi > info.hi {
            r.error(
                range_at,
                &join(&path, "range"),
                format!(
                    "[{}, {}] reaches beyond what model {} accepts for {}, [{}, {}]; runs there would fail: keep the range inside it",
                    p.lo,
                    p.hi,
                    model.name,
                    info.name,
                    with_unit(info.lo, ""),
                    with_unit(info.hi, info.unit)
                ),
            );
        }
        if info.integer && !p.integer {
            r.error(
                at,
                &path,
                format!(
                    "model {} takes whole numbers for {}: add integer = true to [params.{}]",
                    model.name, info.name, p.name
                ),
            );
        }
        if p.unit.is_empty() {
            p.unit = info.unit.to_string();
        } else if !info.unit.is_empty() && p.unit != info.unit {
            r.warning(
                value_at(table, "unit", at),
                &join(&path, "unit"),
                format!(
                    "unit \"{}\" differs from the unit model {} uses for {}, \"{}\"; values are passed unchanged, in the model's unit",
                    p.unit, model.name, info.name, info.unit
                ),
            );
        }
    }
    let fixed_t = sub(root, "model").and_then(|m| sub(m, "fixed"));
    for (name, value) in &spec.model.fixed {
        let path = join("model.fixed", name);
        let at = key_at(fixed_t, name, 0);
        let Some(info) = model.input(name) else {
            r.error(
                at,
                &path,
                format!(
                    "model {} has no input `{name}`; {}its inputs: {input_list}",
                    model.name,
                    did_you_mean(name, &inputs)
                ),
            );
            continue;
        };
        match value.as_f64() {
            None => r.error(
                at,
                &path,
                format!(
                    "model {} takes a number for {name}, in [{}, {}]",
                    model.name,
                    info.lo,
                    with_unit(info.hi, info.unit)
                ),
            ),
            Some(x) if x < info.lo || x > info.hi || (info.integer && x.fract() != 0.0) => r.error(
                at,
                &path,
                format!(
                    "{x} is not accepted by model {} for {name}: give {}a number in [{}, {}]",
                    model.name,
                    if info.integer { "a whole number, " } else { "" },
                    info.lo,
                    with_unit(info.hi, info.unit)
                ),
            ),
            Some(_) => {}
        }
    }
    let metrics: Vec<&str> = model.metrics.iter().map(|m| m.name).collect();
    let metric_list = metrics.join(", ");
    let unknown_metric = |m: &str| {
        format!(
            "model {} reports no metric `{m}`; {}it reports: {metric_list}",
            model.name,
            did_you_mean(m, &metrics)
        )
    };
    if let Some(o) = &spec.objective {
        if model.metric(&o.metric).is_none() {
            let t = sub(root, "objective");
            let key = if t.is_some_and(|t| t.contains_key("maximize")) {
                "maximize"
            } else {
                "minimize"
            };
            r.error(
                value_at(t, key, 0),
                &join("objective", key),
                unknown_metric(&o.metric),
            );
        }
    }
    let target_items: Vec<Option<&DeTable<'_>>> = match root.get("target").map(|v| v.get_ref()) {
        Some(DeValue::Array(items)) => items
            .iter()
            .map(|i| match i.get_ref() {
                DeValue::Table(t) => Some(t),
                _ => None,
            })
            .collect(),
        _ => Vec::new(),
    };
    for (i, t) in spec.targets.iter().enumerate() {
        if model.metric(&t.metric).is_none() {
            let table = target_items.get(i).copied().flatten();
            r.error(
                value_at(table, "metric", 0),
                &format!("target[{}].metric", i + 1),
                unknown_metric(&t.metric),
            );
        }
    }
    if let Some(m) = sub(root, "metrics") {
        for (k, _) in m.iter() {
            let name: &str = k.get_ref();
            if model.metric(name).is_none() {
                r.error(k.span().start, &join("metrics", name), unknown_metric(name));
            }
        }
    }
    for m in &model.metrics {
        if !m.unit.is_empty() {
            spec.metric_units
                .entry(m.name.to_string())
                .or_insert_with(|| m.unit.to_string());
        }
        // The model's bounds, unless the sweep file gives its own.
        let [lo, hi] = m.bounds;
        if lo.is_some() || hi.is_some() {
            let b = spec
                .metric_bounds
                .entry(m.name.to_string())
                .or_insert(super::MetricBounds {
                    lo,
                    hi,
                    fit: super::FitScale::Auto,
                });
            if b.lo.is_none() && b.hi.is_none() {
                // `transform` given without bounds: the model's bounds apply.
                b.lo = lo;
                b.hi = hi;
            }
        }
    }
    for limit in &model.limits {
        if let Some(message) = crossed(limit, model, &spec.params, &spec.model.fixed) {
            let at = limit
                .inputs
                .iter()
                .find_map(|n| params_t.and_then(|t| t.get_key_value(*n)))
                .map_or(0, |(k, _)| k.span().start);
            r.warning(at, "params", message);
        }
    }
}

/// If some corner of the swept box lies beyond `limit`, the message saying
/// so; inputs neither swept nor fixed take the model's defaults.
fn crossed(
    limit: &Limit,
    model: &ModelInfo,
    params: &[ParamSpec],
    fixed: &std::collections::BTreeMap<String, serde_json::Value>,
) -> Option<String> {
    let swept: Vec<&ParamSpec> = params
        .iter()
        .filter(|p| limit.inputs.contains(&p.name.as_str()))
        .collect();
    if swept.is_empty() {
        return None;
    }
    let value_of = |corner: usize, name: &str| -> f64 {
        if let Some(k) = swept.iter().position(|p| p.name == name) {
            let p = swept[k];
            return if corner >> k & 1 == 1 { p.hi } else { p.lo };
        }
        if let Some(x) = fixed.get(name).and_then(serde_json::Value::as_f64) {
            return x;
        }
        model.input(name).map_or(f64::NAN, |i| i.default)
    };
    let corners = (1usize << swept.len().min(12)).min(MAX_LIMIT_CORNERS);
    let mut worst: Option<(f64, usize)> = None;
    for c in 0..corners {
        let v = (limit.value)(&|n| value_of(c, n));
        if v.is_finite() && worst.is_none_or(|(w, _)| v > w) {
            worst = Some((v, c));
        }
    }
    let (v, c) = worst?;
    if v <= limit.max {
        return None;
    }
    let at: Vec<String> = swept
        .iter()
        .map(|p| format!("{} = {}", p.name, value_of(c, &p.name)))
        .collect();
    Some(format!(
        "part of the box crosses a limit of model {}: at {} the {} is {:.2}, above {}; there {}. Narrow the ranges to stay below it",
        model.name,
        at.join(", "),
        limit.what,
        v,
        limit.max,
        limit.beyond
    ))
}
