//! The cycle page: one static HTML file beside a cycle's products that shows
//! each step's quicklooks and facts, stepping through the lead times.
//!
//! In: a directory of products (`<stem>.nc`, its `<stem>_*.png` images and,
//! under `leeward serve`, its `<stem>.json` manifest). Out: for each cycle
//! found there, `<centre>_<cycle>.html` (the product names up to the lead
//! time), written under a hidden name and renamed into place, so a reader
//! never sees half a page. The page needs nothing but a browser: no server
//! code, no script or style from elsewhere, the images and files linked by
//! their names beside it. Without scripts it lists every step one under the
//! other; with them it shows one lead time at a time, stepped with the arrow
//! keys, and reloads itself every two minutes while it is open, keeping the
//! lead time shown. The products are guidance for trained forecasters, not
//! warnings; the page says so.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use serde_json::Value;

/// One step of a cycle as the page shows it.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Step {
    /// Lead time, hours.
    pub lead: i64,
    /// What follows the lead time in the product's name (a grid or member suffix).
    pub variant: String,
    /// The product file's name.
    pub product: String,
    /// Its size, bytes, if known.
    pub bytes: Option<u64>,
    /// Its images' file names.
    pub images: Vec<String>,
    /// The manifest's file name, if there is one.
    pub manifest: Option<String>,
    /// Facts, in order: (label, value).
    pub facts: Vec<(String, String)>,
    /// `complete`, `partial`, or empty where no manifest says.
    pub state: String,
    /// What was looked for and not found.
    pub missing: Vec<String>,
}

/// A cycle's steps, by lead time.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Cycle {
    /// Product names up to the lead time, e.g. `c255_20260314T0000Z`.
    pub prefix: String,
    /// The feed, where a manifest names it.
    pub feed: String,
    /// Its steps, by lead time then variant.
    pub steps: Vec<Step>,
    /// The files of its cyclone tracks beside it (`<prefix>_cyclones*`: image, NetCDF, GeoJSON).
    pub tracks: Vec<String>,
}

/// Split a product name `<prefix>_<HHH>h<variant>.nc` into its parts.
fn product_parts(name: &str) -> Option<(String, i64, String)> {
    let stem = name.strip_suffix(".nc")?;
    let parts: Vec<&str> = stem.split('_').collect();
    let k = parts.iter().rposition(|p| {
        p.len() >= 4 && p.ends_with('h') && p[..p.len() - 1].bytes().all(|b| b.is_ascii_digit())
    })?;
    if k == 0 {
        return None;
    }
    let lead = parts[k][..parts[k].len() - 1].parse().ok()?;
    let variant = parts[k + 1..].join("_");
    Some((parts[..k].join("_"), lead, variant))
}

fn text_of(v: &Value, key: &str) -> String {
    v.get(key)
        .and_then(Value::as_str)
        .unwrap_or_default()
        .to_string()
}

/// Seconds as people read them.
fn seconds(s: f64) -> String {
    if s < 60.0 {
        format!("{s:.1} s")
    } else {
        format!("{}:{:02} min", (s / 60.0) as u64, (s % 60.0).round() as u64)
    }
}

/// An ISO 8601 time as `YYYY-MM-DD HH:MM:SS UTC`.
fn clock(iso: &str) -> String {
    chrono::DateTime::parse_from_rfc3339(iso).map_or_else(
        |_| iso.to_string(),
        |t| t.format("%Y-%m-%d %H:%M:%S UTC").to_string(),
    )
}

/// The facts of a step's manifest: valid time, state, when its last input
/// arrived (publication less latency), publication, latency, processing time.
fn manifest_facts(m: &Value, step: &mut Step) {
    step.state = text_of(m, "state");
    step.missing = m
        .get("missing")
        .and_then(Value::as_array)
        .map(|a| {
            a.iter()
                .filter_map(|x| x.as_str().map(String::from))
                .collect()
        })
        .unwrap_or_default();
    step.bytes = m
        .get("product_bytes")
        .and_then(Value::as_u64)
        .or(step.bytes);
    let published = text_of(m, "published_at");
    let latency = m
        .get("timings_s")
        .and_then(|t| t.get("latency"))
        .and_then(Value::as_f64);
    let total = m
        .get("timings_s")
        .and_then(|t| t.get("total"))
        .and_then(Value::as_f64);
    let mut facts = vec![
        ("valid".to_string(), clock(&text_of(m, "valid_time"))),
        ("state".to_string(), step.state.clone()),
    ];
    if let (Ok(p), Some(l)) = (chrono::DateTime::parse_from_rfc3339(&published), latency) {
        let arrived = p - chrono::Duration::milliseconds((l * 1000.0).round() as i64);
        facts.push((
            "last input arrived".into(),
            arrived.format("%Y-%m-%d %H:%M:%S UTC").to_string(),
        ));
    }
    facts.push(("published".into(), clock(&published)));
    if let Some(l) = latency {
        facts.push(("latency".into(), seconds(l)));
    }
    if let Some(t) = total {
        facts.push(("processing".into(), seconds(t)));
    }
    let revision = m.get("revision").and_then(Value::as_u64).unwrap_or(1);
    if revision > 1 {
        facts.push((
            "revised".into(),
            format!(
                "{} (revision {revision}: changes added by later steps)",
                clock(&text_of(m, "revised_at"))
            ),
        ));
    }
    step.facts = facts;
}

/// The cycles whose products lie in `dir`, read from the names of the
/// files there and the manifests beside them.
pub fn collect(dir: &Path) -> std::io::Result<Vec<Cycle>> {
    let mut names: Vec<String> = std::fs::read_dir(dir)?
        .filter_map(|e| e.ok())
        .map(|e| e.file_name().to_string_lossy().into_owned())
        .filter(|n| !n.starts_with('.'))
        .collect();
    names.sort();
    let mut cycles: BTreeMap<String, Cycle> = BTreeMap::new();
    for name in names.iter().filter(|n| n.ends_with(".nc")) {
        let Some((prefix, lead, variant)) = product_parts(name) else {
            continue;
        };
        let stem = &name[..name.len() - 3];
        let mut step = Step {
            lead,
            variant,
            product: name.clone(),
            bytes: std::fs::metadata(dir.join(name)).ok().map(|m| m.len()),
            images: names
                .iter()
                .filter(|n| n.ends_with(".png") && n.starts_with(&format!("{stem}_")))
                .cloned()
                .collect(),
            ..Step::default()
        };
        let c = cycles.entry(prefix.clone()).or_insert_with(|| Cycle {
            prefix,
            ..Cycle::default()
        });
        let manifest = format!("{stem}.json");
        if let Some(m) = names
            .contains(&manifest)
            .then(|| std::fs::read(dir.join(&manifest)).ok())
            .flatten()
            .and_then(|t| serde_json::from_slice::<Value>(&t).ok())
        {
            // The manifest's order of images is the configured order.
            if let Some(list) = m.get("images").and_then(Value::as_array) {
                let listed: Vec<String> = list
                    .iter()
                    .filter_map(|x| x.as_str().map(String::from))
                    .collect();
                if listed.iter().all(|i| step.images.contains(i)) && !listed.is_empty() {
                    step.images = listed;
                }
            }
            c.feed = text_of(&m, "feed");
            manifest_facts(&m, &mut step);
            step.manifest = Some(manifest);
        }
        c.steps.push(step);
    }
    let mut out: Vec<Cycle> = cycles.into_values().collect();
    for c in &mut out {
        let own = format!("{}_cyclones", c.prefix);
        c.tracks = names
            .iter()
            .filter(|n| n.starts_with(&own))
            .cloned()
            .collect();
        c.steps
            .sort_by(|a, b| (a.lead, &a.variant).cmp(&(b.lead, &b.variant)));
    }
    Ok(out)
}

/// Text for HTML: the five characters that mean something there, escaped.
fn esc(s: &str) -> String {
    let mut o = String::with_capacity(s.len());
    for c in s.chars() {
        match c {
            '&' => o.push_str("&amp;"),
            '<' => o.push_str("&lt;"),
            '>' => o.push_str("&gt;"),
            '"' => o.push_str("&quot;"),
            '\'' => o.push_str("&#39;"),
            c => o.push(c),
        }
    }
    o
}

/// A file name as a link target: percent-encoded where it is not a plain character.
fn href(name: &str) -> String {
    let mut o = String::new();
    for b in name.bytes() {
        if b.is_ascii_alphanumeric() || b"-_.~".contains(&b) {
            o.push(b as char);
        } else {
            o.push_str(&format!("%{b:02X}"));
        }
    }
    o
}

/// The caption of an image: its name after the product's (`eta_500`).
fn caption(product: &str, image: &str) -> String {
    let stem = product.trim_end_matches(".nc");
    image
        .strip_prefix(stem)
        .unwrap_or(image)
        .trim_start_matches('_')
        .trim_end_matches(".png")
        .to_string()
}

fn lead_label(s: &Step) -> String {
    if s.variant.is_empty() {
        format!("+{:03}h", s.lead)
    } else {
        format!("+{:03}h {}", s.lead, s.variant)
    }
}

/// The cycle's cyclone tracks: their map over the latest mean sea-level pressure
/// and the files, on every lead time.
fn tracks_html(o: &mut String, c: &Cycle) {
    if c.tracks.is_empty() {
        return;
    }
    o.push_str("<section class=\"tracks\">\n<h2>Cyclone tracks of the cycle</h2>\n<div class=\"images\">\n");
    for t in c.tracks.iter().filter(|t| t.ends_with(".png")) {
        o.push_str(&format!(
            "<figure><a href=\"{h}\"><img src=\"{h}\" alt=\"cyclone tracks over the latest mean sea-level pressure\" loading=\"lazy\"></a><figcaption>tracks over the latest mean sea-level pressure</figcaption></figure>\n",
            h = href(t)
        ));
    }
    o.push_str("</div>\n<p>");
    let links: Vec<String> = c
        .tracks
        .iter()
        .filter(|t| !t.ends_with(".png"))
        .map(|t| format!("<a href=\"{}\">{}</a>", href(t), esc(t)))
        .collect();
    o.push_str(&links.join(" &middot; "));
    o.push_str(" (every track with its facts at each step)</p>\n</section>\n");
}

fn step_html(o: &mut String, k: usize, s: &Step) {
    let id = format!("step-{k}");
    o.push_str(&format!(
        "<section class=\"step\" id=\"{id}\" data-lead=\"{}\" data-label=\"{}\">\n<h2>{} <span class=\"state {}\">{}</span></h2>\n",
        s.lead,
        esc(&lead_label(s)),
        esc(&lead_label(s)),
        esc(&s.state),
        esc(if s.state.is_empty() { "made" } else { &s.state }),
    ));
    o.push_str("<div class=\"facts\"><table>\n");
    for (k, v) in &s.facts {
        o.push_str(&format!(
            "<tr><th>{}</th><td>{}</td></tr>\n",
            esc(k),
            esc(v)
        ));
    }
    let missing = if s.missing.is_empty() {
        "nothing".to_string()
    } else {
        s.missing
            .iter()
            .map(|m| esc(m))
            .collect::<Vec<_>>()
            .join("<br>")
    };
    o.push_str(&format!("<tr><th>missing</th><td>{missing}</td></tr>\n"));
    let size = s
        .bytes
        .map_or(String::new(), |b| format!(" ({:.1} MB)", b as f64 / 1e6));
    o.push_str(&format!(
        "<tr><th>NetCDF</th><td><a class=\"product\" href=\"{}\">{}</a>{size}</td></tr>\n",
        href(&s.product),
        esc(&s.product)
    ));
    if let Some(m) = &s.manifest {
        o.push_str(&format!(
            "<tr><th>manifest</th><td><a href=\"{}\">{}</a></td></tr>\n",
            href(m),
            esc(m)
        ));
    }
    o.push_str("</table></div>\n<div class=\"images\">\n");
    if s.images.is_empty() {
        o.push_str("<p class=\"none\">No quicklooks for this step.</p>\n");
    }
    for i in &s.images {
        let c = caption(&s.product, i);
        o.push_str(&format!(
            "<figure><a href=\"{h}\"><img src=\"{h}\" alt=\"{a}\" loading=\"lazy\"></a><figcaption>{a}</figcaption></figure>\n",
            h = href(i),
            a = esc(&c)
        ));
    }
    o.push_str("</div>\n</section>\n");
}

const STYLE: &str = r#"
:root { --ink: #1d2126; --soft: #5d6570; --rule: #d5d9de; --paper: #f6f7f5; --accent: #1e5a70; --warm: #9a4a24; }
* { box-sizing: border-box; }
body { margin: 0; font: 15px/1.45 "DejaVu Sans", "Noto Sans", sans-serif; color: var(--ink); background: var(--paper); }
header { padding: 12px 20px 8px; background: #fff; border-bottom: 1px solid var(--rule); }
header h1 { margin: 0; font-size: 20px; }
header p { margin: 2px 0 0; color: var(--soft); font-size: 13px; }
nav { position: sticky; top: 0; z-index: 2; display: flex; flex-wrap: wrap; gap: 4px; align-items: center; padding: 8px 20px; background: #fff; border-bottom: 1px solid var(--rule); }
nav button { font: inherit; font-size: 13px; padding: 3px 9px; border: 1px solid var(--rule); border-radius: 3px; background: #fff; color: var(--ink); cursor: pointer; }
nav button.partial { border-color: var(--warm); }
nav button[aria-current="true"] { background: var(--accent); border-color: var(--accent); color: #fff; }
nav .keys { margin-left: auto; color: var(--soft); font-size: 12px; }
.tracks { padding: 8px 20px; background: #fff; border-bottom: 1px solid var(--rule); }
.tracks h2 { margin: 4px 0; font-size: 16px; }
.tracks p { margin: 4px 0; font-size: 13px; }
main { padding: 12px 20px 24px; }
.step { margin-bottom: 28px; }
.step h2 { margin: 0 0 8px; font-size: 17px; }
.state { font-size: 12px; font-weight: normal; padding: 1px 6px; border-radius: 3px; background: #e4ecef; color: var(--accent); }
.state.partial { background: #f3e4da; color: var(--warm); }
.facts table { border-collapse: collapse; font-size: 13px; margin-bottom: 10px; }
.facts th { text-align: left; font-weight: normal; color: var(--soft); padding: 1px 14px 1px 0; vertical-align: top; }
.facts td { padding: 1px 0; }
.images { display: grid; grid-template-columns: repeat(auto-fill, minmax(420px, 1fr)); gap: 12px; }
figure { margin: 0; background: #fff; border: 1px solid var(--rule); padding: 6px; }
figure img { display: block; width: 100%; height: auto; }
figcaption { font-size: 12px; color: var(--soft); padding-top: 3px; }
.none { color: var(--soft); }
body.one .step { display: none; }
body.one .step.shown { display: block; }
footer { padding: 8px 20px 16px; color: var(--soft); font-size: 12px; }
"#;

const SCRIPT: &str = r#"
(function () {
  var steps = Array.prototype.slice.call(document.querySelectorAll('section.step'));
  if (!steps.length) return;
  document.body.classList.add('one');
  var nav = document.getElementById('leads');
  var buttons = steps.map(function (s, k) {
    var b = document.createElement('button');
    b.type = 'button';
    b.textContent = s.getAttribute('data-label');
    if (s.querySelector('.state.partial')) b.className = 'partial';
    b.addEventListener('click', function () { show(k); });
    nav.insertBefore(b, nav.querySelector('.keys'));
    return b;
  });
  var current = -1;
  function show(k) {
    k = Math.max(0, Math.min(steps.length - 1, k));
    steps.forEach(function (s, i) { s.classList.toggle('shown', i === k); });
    buttons.forEach(function (b, i) { b.setAttribute('aria-current', i === k ? 'true' : 'false'); });
    current = k;
    document.body.setAttribute('data-shown', steps[k].getAttribute('data-label'));
    if (history.replaceState) history.replaceState(null, '', '#' + steps[k].id);
  }
  document.addEventListener('keydown', function (e) {
    if (e.altKey || e.ctrlKey || e.metaKey) return;
    var k = { ArrowRight: current + 1, ArrowDown: current + 1, PageDown: current + 1,
              ArrowLeft: current - 1, ArrowUp: current - 1, PageUp: current - 1,
              Home: 0, End: steps.length - 1 }[e.key];
    if (k === undefined) return;
    e.preventDefault();
    show(k);
  });
  function fromHash(fallback) {
    var hash = location.hash.slice(1), k = fallback;
    steps.forEach(function (s, i) { if (s.id === hash) k = i; });
    return k;
  }
  window.addEventListener('hashchange', function () { show(fromHash(current)); });
  show(fromHash(steps.length - 1));
  setTimeout(function () { location.reload(); }, 120000);
})();
"#;

/// The cycle of a product prefix (`c255_20260314T0000Z`) in words.
fn cycle_words(prefix: &str) -> String {
    let last = prefix.rsplit('_').next().unwrap_or(prefix);
    chrono::NaiveDateTime::parse_from_str(last, "%Y%m%dT%H%MZ").map_or_else(
        |_| prefix.to_string(),
        |t| format!("cycle {} UTC ({prefix})", t.format("%Y-%m-%d %H:%M")),
    )
}

/// The page of one cycle.
pub fn render(c: &Cycle) -> String {
    let title = if c.feed.is_empty() {
        cycle_words(&c.prefix)
    } else {
        format!("{}: {}", c.feed, cycle_words(&c.prefix))
    };
    let partial = c.steps.iter().filter(|s| s.state == "partial").count();
    let mut o = String::new();
    o.push_str("<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n");
    o.push_str("<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n");
    o.push_str(&format!(
        "<title>{}</title>\n<style>{STYLE}</style>\n</head>\n<body>\n",
        esc(&title)
    ));
    o.push_str(&format!(
        "<header><h1>{}</h1><p>{} step(s) published{}; page written {}. Guidance for trained forecasters, not warnings: local procedures and the responsible national meteorological service take precedence.</p></header>\n",
        esc(&title),
        c.steps.len(),
        if partial > 0 { format!(", {partial} partial") } else { String::new() },
        chrono::Utc::now().format("%Y-%m-%d %H:%M:%S UTC")
    ));
    tracks_html(&mut o, c);
    o.push_str("<nav id=\"leads\" aria-label=\"lead times\"><span class=\"keys\">\u{2190} \u{2192} step through the lead times; Home, End: first, last</span></nav>\n<main>\n");
    for (k, s) in c.steps.iter().enumerate() {
        step_html(&mut o, k, s);
    }
    o.push_str("</main>\n<footer>Written by leeward beside the cycle's products; it is rewritten as each step is published.</footer>\n");
    o.push_str(&format!("<script>{SCRIPT}</script>\n</body>\n</html>\n"));
    o
}

/// The page's file name for a cycle.
pub fn page_name(c: &Cycle) -> String {
    format!("{}.html", c.prefix)
}

/// Write (again) the page of every cycle in `dir`, atomically. Returns the pages written.
pub fn refresh(dir: &Path) -> std::io::Result<Vec<PathBuf>> {
    let mut written = Vec::new();
    for c in collect(dir)? {
        let path = dir.join(page_name(&c));
        super::write_file_atomic(&path, render(&c).as_bytes())?;
        written.push(path);
    }
    Ok(written)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn product_names_give_cycle_lead_and_variant() {
        assert_eq!(
            product_parts("c255_20260314T0000Z_024h.nc"),
            Some(("c255_20260314T0000Z".into(), 24, String::new()))
        );
        assert_eq!(
            product_parts("ncep_20111008T0000Z_072h_g2.nc"),
            Some(("ncep_20111008T0000Z".into(), 72, "g2".into()))
        );
        assert_eq!(product_parts("notes.nc"), None);
        assert_eq!(product_parts("x_024h.json"), None);
    }

    #[test]
    fn a_directory_becomes_pages_with_every_image_fact_and_link() {
        let dir = std::env::temp_dir().join(format!("leeward-page-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&dir);
        std::fs::create_dir_all(&dir).unwrap();
        for f in [
            "c7_20260314T0000Z_000h.nc",
            "c7_20260314T0000Z_000h_trop_p_2.png",
            "c7_20260314T0000Z_006h.nc",
            "c7_20260314T0000Z_006h_trop_p_2.png",
            "c7_20260314T0000Z_006h_eta_500.png",
            ".c7_20260314T0000Z_012h.nc.tmp",
        ] {
            std::fs::write(dir.join(f), b"x").unwrap();
        }
        let manifest = serde_json::json!({
            "feed": "a<b", "state": "partial", "valid_time": "2026-03-14T06:00:00Z",
            "missing": ["Temperature at 500 hPa (not arrived)"],
            "images": ["c7_20260314T0000Z_006h_eta_500.png", "c7_20260314T0000Z_006h_trop_p_2.png"],
            "published_at": "2026-03-14T07:00:10.000Z", "product_bytes": 1234567,
            "timings_s": {"latency": 10.0, "total": 4.0}, "revision": 1
        });
        std::fs::write(
            dir.join("c7_20260314T0000Z_006h.json"),
            manifest.to_string(),
        )
        .unwrap();
        let pages = refresh(&dir).unwrap();
        assert_eq!(pages, vec![dir.join("c7_20260314T0000Z.html")]);
        let html = std::fs::read_to_string(&pages[0]).unwrap();
        // Both steps, every image, the NetCDF links, the manifest's facts, escaped.
        assert_eq!(html.matches("<section class=\"step\"").count(), 2);
        assert_eq!(html.matches("<img ").count(), 3);
        assert!(html.contains("href=\"c7_20260314T0000Z_006h.nc\""));
        assert!(html.contains("a&lt;b") && !html.contains("a<b"));
        assert!(
            html.contains("2026-03-14 07:00:00 UTC"),
            "arrival = publication - latency"
        );
        assert!(html.contains("Temperature at 500 hPa (not arrived)"));
        assert!(html.contains("class=\"state partial\""));
        // The manifest's order: eta before trop_p.
        let (e, t) = (
            html.find("006h_eta_500.png").unwrap(),
            html.find("006h_trop_p_2.png").unwrap(),
        );
        assert!(e < t);
        // No hidden or temporary file is taken for a step, no file left behind.
        assert!(!html.contains("012h"));
        let left: Vec<_> = std::fs::read_dir(&dir)
            .unwrap()
            .filter_map(|e| e.ok())
            .map(|e| e.file_name().to_string_lossy().into_owned())
            .filter(|n| n.ends_with(".html") || n.contains(".html."))
            .collect();
        assert_eq!(left, vec!["c7_20260314T0000Z.html".to_string()]);
        let _ = std::fs::remove_dir_all(&dir);
    }
}
