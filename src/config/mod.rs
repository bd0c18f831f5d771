//! The configuration file (TOML): what to make and how to write it.
//!
//! In: the text of a TOML file, or nothing (every key has a default that
//! serves a typical forecast office). Out: a validated [`Config`], or every
//! problem at once, each naming its key. Unknown keys are errors.

use std::path::Path;

use serde::{Deserialize, Serialize};
use thiserror::Error;

pub mod settings;
pub use settings::{
    Changes, Cyclones, Isentropic, OutlineKind, Output, Products, Quicklooks, Thickness,
};

/// A configuration problem, naming the key.
#[derive(Debug, Error, Clone, PartialEq)]
pub enum ConfigError {
    /// File unreadable.
    #[error("cannot read config {path}: {reason}")]
    Read {
        /// Path given.
        path: String,
        /// The system's words.
        reason: String,
    },
    /// Not TOML or not our keys.
    #[error("config {path}: {reason}")]
    Parse {
        /// Path given.
        path: String,
        /// The parser's words (it names the key and line).
        reason: String,
    },
    /// Values that parse but do not make sense.
    #[error("config {path}: {}", .problems.join("; "))]
    Invalid {
        /// Path given.
        path: String,
        /// One entry per bad key: "key: reason".
        problems: Vec<String>,
    },
}

/// The whole configuration.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, Default)]
#[serde(deny_unknown_fields, default)]
pub struct Config {
    /// Which products to make.
    pub products: Products,
    /// How to write them.
    pub output: Output,
    /// Isentropic analysis: surfaces, layers, dynamic tropopause.
    pub isentropic: Isentropic,
    /// Isobaric layer thickness.
    pub thickness: Thickness,
    /// Changes in time.
    pub changes: Changes,
    /// The service (`leeward serve`): directories, workers, timeouts.
    pub service: crate::service::settings::Service,
    /// Quicklook images beside each product file.
    pub quicklook: Quicklooks,
    /// Cyclone centres and tracks, and the layers of their fields.
    pub cyclones: Cyclones,
    /// The model feeds the service serves.
    pub feed: Vec<crate::service::settings::Feed>,
}

impl Quicklooks {
    /// Every problem of the settings, as "key: reason".
    pub fn problems(&self) -> Vec<String> {
        let mut p = Vec::new();
        for (k, s) in self.images.iter().enumerate() {
            if let Err(e) = crate::output::images::parse(s) {
                p.push(format!("quicklook.images[{k}]: {e}"));
            }
        }
        if self.outline == OutlineKind::Terrain
            && (self.terrain_m.is_empty() || self.terrain_m.iter().any(|h| !h.is_finite()))
        {
            p.push("quicklook.terrain_m: needs finite heights when outline = \"terrain\"".into());
        }
        if !(self.contour_pvu > 0.0 && self.contour_pvu <= 20.0) {
            p.push(format!(
                "quicklook.contour_pvu: {} is outside 0 to 20",
                self.contour_pvu
            ));
        }
        if !(150.0..=2000.0).contains(&self.contour_theta_k) {
            p.push(format!(
                "quicklook.contour_theta_k: {} is outside 150 to 2000",
                self.contour_theta_k
            ));
        }
        for (key, v) in &self.scales {
            let name = format!("quicklook.scales.{key:?}");
            if let Err(e) = crate::output::images::parse(key) {
                p.push(format!("{name}: {e}"));
            }
            let ok_len = matches!(v.len(), 2 | 3) && v.iter().all(|x| x.is_finite());
            if !ok_len {
                p.push(format!(
                    "{name}: write [min, max] or [min, max, band width], finite numbers"
                ));
                continue;
            }
            let (lo, hi) = (v[0], v[1]);
            let step = v
                .get(2)
                .copied()
                .unwrap_or_else(|| crate::output::quicklook::band_step(hi - lo));
            let bands = (hi - lo) / step;
            let max = crate::output::quicklook::MAX_BANDS as f64;
            if lo >= hi {
                p.push(format!("{name}: min {lo} is not below max {hi}"));
            } else if !(step > 0.0 && (1.0..=max + 1e-9).contains(&bands)) {
                p.push(format!(
                    "{name}: band width {step} gives {bands:.1} bands (1 to {max})"
                ));
            }
        }
        p
    }
}

impl Output {
    /// The mantissa bits each product keeps, as configured.
    pub fn kept_bits(&self) -> crate::output::precision::KeptBits {
        crate::output::precision::KeptBits {
            all: self.significant_bits,
            by_name: self.kept_bits.clone(),
        }
    }

    /// The institution named in the files for centre `c`: the configured name,
    /// else leeward's own list.
    pub fn institution(&self, c: u16) -> String {
        self.institutions
            .get(&c.to_string())
            .cloned()
            .unwrap_or_else(|| crate::output::cf::institution(c))
    }
}

impl Config {
    /// The settings a step of feed `f` is made with, and all a job spec
    /// carries: the file's product, output, quicklook and cyclone settings,
    /// with the feed's own `products` table where it has one; no service
    /// settings and no feed but none (the step needs neither).
    pub fn for_feed(&self, f: &crate::service::settings::Feed) -> Config {
        Config {
            products: f.products.clone().unwrap_or_else(|| self.products.clone()),
            service: crate::service::settings::Service::default(),
            feed: Vec::new(),
            ..self.clone()
        }
    }

    /// Parse and validate TOML text; `origin` names it in messages.
    pub fn from_toml(text: &str, origin: &str) -> Result<Config, ConfigError> {
        Config::from_toml_with(text, origin, |_| {})
    }

    /// Parse TOML text, apply `overrides` (the command line's), then validate
    /// the result, so that an override meets the same checks as the file.
    pub fn from_toml_with(
        text: &str,
        origin: &str,
        overrides: impl FnOnce(&mut Config),
    ) -> Result<Config, ConfigError> {
        let mut cfg: Config = toml::from_str(text).map_err(|e| ConfigError::Parse {
            path: origin.to_string(),
            reason: e.to_string(),
        })?;
        overrides(&mut cfg);
        // Layers are kept in order of their middle potential temperature, so that the
        // layer coordinate in the files is monotonic as CF requires.
        cfg.isentropic
            .layers
            .sort_by(|a, b| (a[0] + a[1]).total_cmp(&(b[0] + b[1])));
        // Isobaric layers likewise, by middle pressure from the ground up: the
        // layer coordinate (the middles, with the bottom and top as bounds) is
        // then monotonic.
        cfg.thickness
            .layers_hpa
            .sort_by(|a, b| (b[0] + b[1]).total_cmp(&(a[0] + a[1])));
        let problems = cfg.problems();
        if problems.is_empty() {
            Ok(cfg)
        } else {
            Err(ConfigError::Invalid {
                path: origin.to_string(),
                problems,
            })
        }
    }

    /// Read, parse and validate a file.
    pub fn load(path: &Path) -> Result<Config, ConfigError> {
        Config::load_with(path, |_| {})
    }

    /// Read and parse a file, apply `overrides`, then validate.
    pub fn load_with(
        path: &Path,
        overrides: impl FnOnce(&mut Config),
    ) -> Result<Config, ConfigError> {
        let text = std::fs::read_to_string(path).map_err(|e| ConfigError::Read {
            path: path.display().to_string(),
            reason: e.to_string(),
        })?;
        Config::from_toml_with(&text, &path.display().to_string(), overrides)
    }

    /// Every problem with the values, as "key: reason".
    pub fn problems(&self) -> Vec<String> {
        let mut p = Vec::new();
        if !(0..=9).contains(&self.output.deflate_level) {
            p.push(format!(
                "output.deflate_level: {} is outside 0 to 9",
                self.output.deflate_level
            ));
        }
        if let Some(b) = self
            .output
            .significant_bits
            .filter(|b| !(1..=23).contains(b))
        {
            p.push(format!("output.significant_bits: {b} is outside 1 to 23"));
        }
        for (name, b) in &self.output.kept_bits {
            if !(1..=23).contains(b) {
                p.push(format!("output.kept_bits.{name}: {b} is outside 1 to 23"));
            }
        }
        for (k, name) in &self.output.institutions {
            if k.parse::<u16>().is_err() {
                p.push(format!(
                    "output.institutions: key {k:?} is not a centre number (0 to 65535)"
                ));
            }
            if name.trim().is_empty() {
                p.push(format!("output.institutions.{k}: empty name"));
            }
        }
        let iso = &self.isentropic;
        let in_range = |t: f64| (150.0..=2000.0).contains(&t);
        if self.products.isentropic && iso.surfaces.is_empty() {
            p.push("isentropic.surfaces: empty while products.isentropic is on".into());
        }
        if iso.surfaces.windows(2).any(|w| w[1] <= w[0]) {
            p.push("isentropic.surfaces: must be strictly ascending".into());
        }
        if let Some(t) = iso.surfaces.iter().find(|t| !in_range(**t)) {
            p.push(format!(
                "isentropic.surfaces: {t} K is outside 150 to 2000 K"
            ));
        }
        for (k, l) in iso.layers.iter().enumerate() {
            if !(in_range(l[0]) && in_range(l[1]) && l[0] < l[1]) {
                p.push(format!(
                    "isentropic.layers[{k}]: [{}, {}] must be [bottom, top] with bottom < top, within 150 to 2000 K",
                    l[0], l[1]
                ));
            }
        }
        let mut mids: Vec<f64> = iso.layers.iter().map(|l| 0.5 * (l[0] + l[1])).collect();
        mids.sort_by(f64::total_cmp);
        if let Some(w) = mids.windows(2).find(|w| w[1] == w[0]) {
            p.push(format!("isentropic.layers: two layers share the middle {} K; the layer coordinate needs distinct middles", w[0]));
        }
        if self.products.layer_pv && iso.layers.is_empty() {
            p.push("isentropic.layers: empty while products.layer_pv is on".into());
        }
        if self.products.tropopause && iso.tropopause_pvu.is_empty() {
            p.push("isentropic.tropopause_pvu: empty while products.tropopause is on".into());
        }
        if let Some(v) = iso
            .tropopause_pvu
            .iter()
            .find(|v| !(**v > 0.0 && **v <= 20.0))
        {
            p.push(format!(
                "isentropic.tropopause_pvu: {v} must be a magnitude above 0 and at most 20 PVU"
            ));
        }
        if !(250.0..=1000.0).contains(&iso.tropopause_theta_bound) {
            p.push(format!(
                "isentropic.tropopause_theta_bound: {} K is outside 250 to 1000 K",
                iso.tropopause_theta_bound
            ));
        }
        if !(100.0..=1100.0).contains(&iso.fold_bottom_hpa) {
            p.push(format!(
                "isentropic.fold_bottom_hpa: {} hPa is outside 100 to 1100 hPa",
                iso.fold_bottom_hpa
            ));
        }
        if iso.tropopause_pvu.windows(2).any(|w| w[1] <= w[0]) {
            p.push("isentropic.tropopause_pvu: must be strictly ascending".into());
        }
        for (k, l) in self.thickness.layers_hpa.iter().enumerate() {
            if !(l[0] > l[1] && l[1] > 0.0 && l[0] <= 1100.0) {
                p.push(format!(
                    "thickness.layers_hpa[{k}]: [{}, {}] must be [bottom, top] in hPa with bottom > top > 0, bottom at most 1100",
                    l[0], l[1]
                ));
            }
        }
        let mids: Vec<f64> = self
            .thickness
            .layers_hpa
            .iter()
            .map(|l| 0.5 * (l[0] + l[1]))
            .collect();
        for (k, m) in mids.iter().enumerate() {
            if mids[..k].iter().any(|o| (o - m).abs() < 1e-6) {
                p.push(format!(
                    "thickness.layers_hpa[{k}]: its middle, {m} hPa, is another layer's middle: the layer coordinate needs one value per layer"
                ));
            }
        }
        if self.products.thickness && self.thickness.layers_hpa.is_empty() {
            p.push("thickness.layers_hpa: empty while products.thickness is on".into());
        }
        if !(1..=48).contains(&self.changes.budget_max_interval_h) {
            p.push(format!(
                "changes.budget_max_interval_h: {} h is outside 1 to 48 h",
                self.changes.budget_max_interval_h
            ));
        }
        if !(0.1..=48.0).contains(&self.changes.budget_max_substep_h) {
            p.push(format!(
                "changes.budget_max_substep_h: {} h is outside 0.1 to 48 h",
                self.changes.budget_max_substep_h
            ));
        }
        if !(1e-4..=0.5).contains(&self.changes.budget_tolerance) {
            p.push(format!(
                "changes.budget_tolerance: {} is outside 0.0001 to 0.5 grid lengths",
                self.changes.budget_tolerance
            ));
        }
        if let Some(h) = self
            .changes
            .intervals_h
            .iter()
            .find(|h| **h == 0 || **h > 240)
        {
            p.push(format!("changes.intervals_h: {h} h is outside 1 to 240 h"));
        }
        p.extend(self.cyclones.problems());
        p.extend(self.quicklook.problems());
        p.extend(crate::service::settings::problems(
            &self.service,
            &self.feed,
        ));
        if !self.products.any() {
            p.push("products: every product is switched off; nothing would be made".into());
        }
        p
    }
}

/// Check a configuration text and report every problem at once: unknown
/// keys anywhere, values of the wrong type in each table, and values that
/// parse but do not make sense, each named by its key. Only a TOML syntax
/// error stops the check early (the rest cannot be read).
pub fn check(text: &str, origin: &str) -> Result<Config, Vec<String>> {
    let value: toml::Value = toml::from_str(text).map_err(|e| vec![format!("{origin}: {e}")])?;
    let mut problems = Vec::new();
    let as_value =
        |v: Result<toml::Value, toml::ser::Error>| v.unwrap_or(toml::Value::Boolean(false));
    let known = as_value(toml::Value::try_from(Config::default()));
    let feed_known = as_value(toml::Value::try_from(
        crate::service::settings::Feed::default(),
    ));
    let products_known = as_value(toml::Value::try_from(Products::default()));
    fn unknown(v: &toml::Value, k: &toml::Value, path: &str, out: &mut Vec<String>) {
        if let (Some(t), Some(kt)) = (v.as_table(), k.as_table()) {
            for (key, sub) in t {
                let p = if path.is_empty() {
                    key.clone()
                } else {
                    format!("{path}.{key}")
                };
                match kt.get(key) {
                    None => out.push(format!("{p}: unknown key")),
                    // An empty table in the defaults is a map of free keys
                    // (`quicklook.scales`, `output.institutions`): its keys are
                    // checked by their own rules.
                    Some(ks) if ks.as_table().is_some_and(|t| !t.is_empty()) => {
                        unknown(sub, ks, &p, out)
                    }
                    _ => {}
                }
            }
        }
    }
    if let Some(t) = value.as_table() {
        for (key, sub) in t {
            match (key.as_str(), known.get(key)) {
                ("feed", _) => match sub.as_array() {
                    Some(feeds) => {
                        for (k, f) in feeds.iter().enumerate() {
                            let path = format!("feed[{k}]");
                            for (fk, fv) in f.as_table().into_iter().flatten() {
                                if fk == "products" {
                                    let p = format!("{path}.products");
                                    unknown(fv, &products_known, &p, &mut problems);
                                } else if feed_known.get(fk).is_none() {
                                    problems.push(format!("{path}.{fk}: unknown key"));
                                }
                            }
                        }
                    }
                    None => {
                        problems.push("feed: must be an array of tables, written [[feed]]".into())
                    }
                },
                (_, None) => problems.push(format!("{key}: unknown table or key")),
                (_, Some(k)) => unknown(sub, k, key, &mut problems),
            }
        }
    }
    let mut cleaned = value.clone();
    prune(&mut cleaned, &known, &feed_known, &products_known);
    // Wrong types, table by table, so that one bad table does not hide the others.
    fn typed<T: serde::de::DeserializeOwned>(
        v: Option<&toml::Value>,
        name: &str,
        out: &mut Vec<String>,
    ) {
        if let Some(v) = v {
            if let Err(e) = v.clone().try_into::<T>() {
                out.push(format!("{name}: {}", e.to_string().trim()));
            }
        }
    }
    typed::<Products>(cleaned.get("products"), "products", &mut problems);
    typed::<Output>(cleaned.get("output"), "output", &mut problems);
    typed::<Isentropic>(cleaned.get("isentropic"), "isentropic", &mut problems);
    typed::<Thickness>(cleaned.get("thickness"), "thickness", &mut problems);
    typed::<Changes>(cleaned.get("changes"), "changes", &mut problems);
    typed::<Quicklooks>(cleaned.get("quicklook"), "quicklook", &mut problems);
    typed::<Cyclones>(cleaned.get("cyclones"), "cyclones", &mut problems);
    typed::<crate::service::settings::Service>(cleaned.get("service"), "service", &mut problems);
    if let Some(feeds) = cleaned.get("feed").and_then(|f| f.as_array()) {
        for (k, f) in feeds.iter().enumerate() {
            typed::<crate::service::settings::Feed>(Some(f), &format!("feed[{k}]"), &mut problems);
        }
    }
    if problems.is_empty() {
        return match Config::from_toml(text, origin) {
            Ok(c) => Ok(c),
            Err(ConfigError::Invalid { problems, .. }) => Err(problems),
            Err(e) => Err(vec![e.to_string()]),
        };
    }
    // Check the values too, in one run: without the unknown keys, and with
    // each table of the wrong type left at its defaults.
    if let Some(t) = cleaned.as_table_mut() {
        let bad: Vec<String> = t
            .iter()
            .filter(|(k, v)| {
                k.as_str() != "feed" && {
                    let mut one = toml::map::Map::new();
                    one.insert((*k).clone(), (*v).clone());
                    toml::Value::Table(one).try_into::<Config>().is_err()
                }
            })
            .map(|(k, _)| k.clone())
            .collect();
        for k in bad {
            t.remove(&k);
        }
        if let Some(feeds) = t.get_mut("feed").and_then(|f| f.as_array_mut()) {
            feeds.retain(|f| {
                f.clone()
                    .try_into::<crate::service::settings::Feed>()
                    .is_ok()
            });
        }
    }
    if let Ok(cfg) = cleaned.try_into::<Config>() {
        problems.extend(cfg.problems());
    }
    Err(problems)
}

/// Remove the keys `known` does not have, at every depth, and in each feed.
fn prune(v: &mut toml::Value, known: &toml::Value, feed: &toml::Value, products: &toml::Value) {
    fn walk(v: &mut toml::Value, k: &toml::Value) {
        if let (Some(t), Some(kt)) = (v.as_table_mut(), k.as_table()) {
            t.retain(|key, _| kt.contains_key(key));
            for (key, sub) in t.iter_mut() {
                if let Some(ks) = kt
                    .get(key)
                    .filter(|x| x.as_table().is_some_and(|t| !t.is_empty()))
                {
                    walk(sub, ks);
                }
            }
        }
    }
    let feeds = v.as_table_mut().and_then(|t| t.remove("feed"));
    walk(v, known);
    if let (Some(t), Some(toml::Value::Array(mut fs))) = (v.as_table_mut(), feeds) {
        for f in fs.iter_mut() {
            let p = f.as_table_mut().and_then(|t| t.remove("products"));
            walk(f, feed);
            if let (Some(ft), Some(mut p)) = (f.as_table_mut(), p) {
                walk(&mut p, products);
                ft.insert("products".into(), p);
            }
        }
        t.insert("feed".into(), toml::Value::Array(fs));
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_feeds_step_settings_hold_its_products_and_nothing_of_the_service_or_other_feeds() {
        let text = r#"
[products]
vorticity = true
[service]
watch_dir = "/srv/in"
out_dir = "/srv/out"
state_dir = "/srv/state"
[[feed]]
name = "alps"
levels_hpa = [500.0]
[feed.products]
vorticity = false
[[feed]]
name = "coast"
levels_hpa = [500.0]
"#;
        let cfg = Config::from_toml(text, "test").unwrap();
        let alps = cfg.for_feed(&cfg.feed[0]);
        assert!(!alps.products.vorticity);
        assert!(alps.feed.is_empty());
        assert_eq!(alps.service, crate::service::settings::Service::default());
        assert_eq!(alps.isentropic, cfg.isentropic);
        let coast = cfg.for_feed(&cfg.feed[1]);
        assert!(coast.products.vorticity);
    }

    #[test]
    fn check_reports_every_planted_error_in_one_run() {
        let text = r#"
[products]
vorticity = "yes"
colour = true
[output]
deflate_level = 12
[isentropic]
surfaces = [300.0, 290.0]
[thickness]
layers_hpa = [[500.0, 1000.0]]
[service]
workers = 0
metrics_listen = "not an address"
[[feed]]
name = "bad name"
file_pattern = "("
complete = "marker"
[[feed]]
name = "ok"
levels_hpa = [500.0]
shelf = 3
[[feed]]
name = "off"
levels_hpa = [500.0]
[feed.products]
vorticity = false
stability = false
isobaric_pv = false
isentropic = false
tropopause = false
layer_pv = false
thickness = false
[extras]
x = 1
"#;
        // Unknown keys, wrong types and bad values, all in one run.
        let p = check(text, "t").unwrap_err();
        for want in [
            "products.colour: unknown key",
            "feed[1].shelf: unknown key",
            "extras: unknown",
            "products: ",
            "output.deflate_level",
            "isentropic.surfaces",
            "thickness.layers_hpa[0]",
            "service.workers",
            "service.metrics_listen",
            "feed[0].name",
            "feed[0].file_pattern",
            "feed[0].marker_pattern",
            "feed[2].products",
        ] {
            assert!(p.iter().any(|x| x.starts_with(want)), "{want}: {p:?}");
        }
        assert!(check("", "t").is_ok());
        assert!(check("[output\n", "t").is_err());
    }

    #[test]
    fn defaults_and_every_problem_at_once() {
        assert_eq!(Config::from_toml("", "t").ok(), Some(Config::default()));
        let bad = "[products]\nvorticity = false\nstability = false\nisobaric_pv = false\n\
                   isentropic = false\ntropopause = false\nlayer_pv = false\nthickness = false\n\
                   [output]\ndeflate_level = 12\n\
                   [isentropic]\nsurfaces = [300.0, 290.0]\nlayers = [[310.0, 300.0]]\ntropopause_pvu = [-2.0]\n";
        match Config::from_toml(bad, "t") {
            Err(ConfigError::Invalid { problems, .. }) => {
                assert_eq!(problems.len(), 5, "{problems:?}");
                assert!(problems[0].starts_with("output.deflate_level"));
                for key in [
                    "isentropic.surfaces",
                    "isentropic.layers[0]",
                    "isentropic.tropopause_pvu",
                    "products",
                ] {
                    assert!(
                        problems.iter().any(|p| p.starts_with(key)),
                        "{key}: {problems:?}"
                    );
                }
            }
            other => panic!("expected five problems, got {other:?}"),
        }
        let unknown = "[output]\ndeflate = 3\n";
        assert!(matches!(
            Config::from_toml(unknown, "t"),
            Err(ConfigError::Parse { .. })
        ));
    }
}
