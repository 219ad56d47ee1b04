//! `tarn report`: the picture of a campaign as one self-contained HTML file.
//!
//! Owns: what the report page shows and how it reads the store for it — the header
//! (campaign, system, kT, seed, file hash, tarn version, status), the caution, the
//! discovery timeline, free energies by round, the ESS fraction, the sample landscape of
//! 2-D systems (for a molecule whose dedup fingerprint is made of dihedrals, the
//! Ramachandran scatter of its first two instead), the 1-D profile, the catalogue and
//! the rounds table. Must not touch: the
//! engine's control flow or the store's content; it only reads, and writes the one
//! output file (through a temporary file and a rename, so that a browser that reloads
//! the page while the engine refreshes it never sees half a file).
//!
//! The page needs no network and no JavaScript: styles are inline, plots are inline SVG
//! from [`super::plots`], and text that comes from files or the store (stage names, stop
//! reasons, the campaign file) goes through [`escape`].
//!
//! # Profile arrays
//! The 1-D profile section draws the newest committed evaluate task's `profile` array,
//! of shape [bins, 3] (bin centre, F in kT with NaN for an empty bin, its standard
//! error), with `profile_reference` ([bins], kT) when present and the task's
//! `profile_rms` / `profile_boltzmann_rms` metrics. Without them the section says
//! plainly that the store holds no profile.

use std::fmt::Write as _;
use std::path::Path;

use anyhow::Context as _;

use super::plots::{self, Axes, Grid, Landscape, ProfileData, StateTrack};
use crate::physics::cv::dihedral_degrees;
use crate::physics::fingerprint::Fingerprint;
use crate::physics::SystemSpec;
use crate::protocol::Role;
use crate::spec::Campaign;
use crate::store::{
    keys, CampaignVersion, Meta, RoundRecord, StateRecord, StopDecision, Store, TaskRecord,
    TaskStatus,
};

/// The caution every report carries, word for word.
pub const CAUTION: &str = "Estimates from sampling are only as good as the energy model and the convergence checks behind them. Decisions that affect people — drug, material or safety decisions — must rest on validation and expert judgment.";

/// At most this many explore samples are drawn in the landscape, so that the page stays
/// small (a few hundred kB) whatever the campaign's length.
pub const MAX_LANDSCAPE_POINTS: usize = 4000;

/// At most this many rounds are read for the landscape; they are spread evenly over the
/// campaign, first and last included.
pub const MAX_LANDSCAPE_ROUNDS: usize = 40;

/// At most this many states get a free-energy line (those of lowest free energy).
pub const MAX_FREE_ENERGY_TRACKS: usize = 10;

/// Escapes text for HTML element content and quoted attribute values.
pub fn escape(text: &str) -> String {
    let mut out = String::with_capacity(text.len());
    for c in text.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            _ => out.push(c),
        }
    }
    out
}

/// Writes the report of `store` to `out`, through a temporary file beside it and a
/// rename, so that a reader never sees a half-written page.
pub fn write_report(store: &Store, out: &Path) -> anyhow::Result<()> {
    let html = render(store)?;
    let name = out
        .file_name()
        .with_context(|| format!("report path {} names no file", out.display()))?;
    let mut tmp_name = name.to_os_string();
    tmp_name.push(format!(".tmp{}", std::process::id()));
    let tmp = out.with_file_name(tmp_name);
    std::fs::write(&tmp, html.as_bytes())
        .with_context(|| format!("writing the report to {}", tmp.display()))?;
    std::fs::rename(&tmp, out).with_context(|| {
        let _ = std::fs::remove_file(&tmp);
        format!("moving the report into place at {}", out.display())
    })?;
    Ok(())
}

/// Renders the report of `store` as one HTML document.
pub fn render(store: &Store) -> anyhow::Result<String> {
    let c = Context::read(store)?;
    let mut page = String::with_capacity(256 << 10);
    page.push_str(&head(&c));
    page.push_str(&header(&c));
    page.push_str("<main>\n");
    page.push_str(&caution());
    page.push_str(&parse_problem(&c));
    page.push_str(&contents());
    page.push_str(&discovery(&c)?);
    // Free energies and the ESS that qualifies them sit side by side.
    page.push_str("<div class=\"row\">\n");
    page.push_str(&free_energy_section(&c)?);
    page.push_str(&ess_section(&c)?);
    page.push_str("</div>\n");
    page.push_str(&landscape_section(store, &c)?);
    page.push_str(&profile_section(store, &c)?);
    page.push_str(&paths_section(store, &c)?);
    page.push_str(&catalogue_section(&c));
    page.push_str(&rounds_section(&c));
    page.push_str(&campaign_file_section(&c));
    page.push_str("</main>\n");
    page.push_str(&footer(&c));
    page.push_str("</body>\n</html>\n");
    Ok(page)
}

/// Everything the page reads from the store, read once.
struct Context {
    meta: Meta,
    version: CampaignVersion,
    n_versions: usize,
    /// The campaign rebuilt from its stored text; the message if that failed (the report
    /// still shows what the store holds).
    campaign: Result<Campaign, String>,
    system: Option<SystemSpec>,
    rounds: Vec<RoundRecord>,
    states: Vec<StateRecord>,
    finished: Option<StopDecision>,
}

impl Context {
    fn read(store: &Store) -> anyhow::Result<Context> {
        let meta = store.meta()?;
        let versions = store.campaign_versions()?;
        let version = store.current_campaign()?;
        let campaign = Campaign::parse(&version.path, &version.text, Path::new(&meta.base_dir))
            .map_err(|e| e.to_string());
        let system = campaign
            .as_ref()
            .ok()
            .and_then(|c| serde_json::from_value::<SystemSpec>(c.system.table.clone()).ok());
        Ok(Context {
            meta,
            n_versions: versions.len(),
            version,
            campaign,
            system,
            rounds: store.rounds()?,
            states: store.states()?,
            finished: store.finished()?,
        })
    }

    fn dim(&self) -> Option<usize> {
        self.campaign.as_ref().ok().map(|c| c.system.dim)
    }

    /// The unit the system's energies are in, for axis labels and table heads.
    fn energy_unit(&self) -> &'static str {
        match &self.system {
            Some(SystemSpec::LennardJones { .. }) => "ε",
            Some(SystemSpec::Phi4 { .. }) => "lattice action units",
            Some(SystemSpec::External { .. }) => "the external model's unit",
            _ => "model units",
        }
    }

    /// The name of the evaluate stage, if the campaign has one.
    fn evaluate_stage(&self) -> Option<&str> {
        match &self.campaign {
            Ok(c) => c.evaluate.as_ref().map(|s| s.name.as_str()),
            Err(_) => None,
        }
    }

    fn total_evals(&self) -> u64 {
        self.rounds.last().map_or(0, |r| r.cumulative_energy_evals)
    }
}

/// Digits in groups of three, with thin spaces, so that large counts read at a glance.
fn group(n: u64) -> String {
    let s = n.to_string();
    let mut out = String::new();
    for (i, ch) in s.chars().enumerate() {
        if i > 0 && (s.len() - i).is_multiple_of(3) {
            out.push('\u{2009}');
        }
        out.push(ch);
    }
    out
}

/// A Unix time as `YYYY-MM-DD HH:MM UTC` (civil-from-days, proleptic Gregorian).
fn utc(unix: f64) -> String {
    if !unix.is_finite() || unix < 0.0 {
        return "unknown".into();
    }
    let secs = unix as i64;
    let (days, rem) = (secs.div_euclid(86_400), secs.rem_euclid(86_400));
    let z = days + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z - era * 146_097;
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let d = doy - (153 * mp + 2) / 5 + 1;
    let m = if mp < 10 { mp + 3 } else { mp - 9 };
    let y = yoe + era * 400 + i64::from(m <= 2);
    format!(
        "{y:04}-{m:02}-{d:02} {:02}:{:02} UTC",
        rem / 3600,
        rem % 3600 / 60
    )
}

/// A free energy with its error, or a dash.
fn free_energy_text(s: &StateRecord) -> String {
    match s.estimates.last() {
        Some(e) if e.free_energy.is_finite() => match e.free_energy_err.filter(|x| x.is_finite()) {
            Some(err) => format!("{:.3} ± {:.3}", e.free_energy, err),
            None => format!("{:.3}", e.free_energy),
        },
        _ => "–".into(),
    }
}

/// A plot in a figure with its caption. `empty` marks a notice chart (nothing to plot),
/// so that readers and tests can tell a notice from a drawn chart.
fn figure(id: &str, svg: &str, label: &str, caption: &str, empty: Option<&str>) -> String {
    let svg = svg.replacen(
        "<svg ",
        &format!("<svg role=\"img\" aria-label=\"{}\" ", escape(label)),
        1,
    );
    let empty = empty
        .map(|e| format!(" data-empty=\"{}\"", escape(e)))
        .unwrap_or_default();
    format!("<figure class=\"plot\" id=\"{id}\"{empty}>\n{svg}<figcaption>{caption}</figcaption>\n</figure>\n")
}

const STYLE: &str = r#"
:root { --paper:#fdfcf9; --ground:#f1efe9; --ink:#253238; --muted:#6b7880; --line:#e2dfd7;
  --accent:#2f6f73; --night:#20363b; --warn:#8a5a1c; --warn-bg:#fbf2e2; --warn-edge:#c07a35; }
* { box-sizing: border-box; }
html { background: var(--ground); }
body { margin: 0; color: var(--ink); background: var(--ground);
  font: 15px/1.55 system-ui, -apple-system, "Segoe UI", Roboto, "Helvetica Neue", Arial, sans-serif; }
header.top { background: var(--night); color: #eef1ee; padding: 26px 0 22px; }
header.top .inner, main, footer .inner { max-width: 1240px; margin: 0 auto; padding: 0 32px; }
header.top .brand { font-size: 13px; letter-spacing: .12em; text-transform: uppercase; color: #a9c4c2; }
header.top h1 { margin: 4px 0 2px; font-size: 30px; font-weight: 600; }
header.top .system { color: #cfd9d6; margin: 0 0 16px; }
dl.facts { display: grid; grid-template-columns: repeat(auto-fill, minmax(210px, 1fr)); gap: 10px 24px; margin: 0; }
dl.facts div { border-left: 2px solid #47686b; padding-left: 10px; }
dl.facts dt { font-size: 12px; text-transform: uppercase; letter-spacing: .08em; color: #a9c4c2; }
dl.facts dd { margin: 0; font-variant-numeric: tabular-nums; overflow-wrap: anywhere; }
.status { margin: 16px 0 0; padding: 10px 14px; border-radius: 6px; background: #2c4a50; }
.status.done { background: #2d5147; }
.caution { margin: 22px 0; padding: 14px 18px; background: var(--warn-bg); color: #4a3514;
  border: 1px solid #ecd7b3; border-left: 6px solid var(--warn-edge); border-radius: 8px; }
.caution strong { color: var(--warn); }
nav.contents { margin: 0 0 8px; font-size: 14px; }
nav.contents a { color: var(--accent); text-decoration: none; margin-right: 16px; white-space: nowrap; }
nav.contents a:hover { text-decoration: underline; }
section { background: var(--paper); border: 1px solid var(--line); border-radius: 10px;
  padding: 18px 24px 20px; margin: 18px 0; }
section h2 { margin: 0 0 4px; font-size: 20px; font-weight: 600; }
section p.lead { margin: 0 0 14px; color: var(--muted); max-width: 80ch; }
.pair { display: grid; grid-template-columns: repeat(auto-fit, minmax(440px, 1fr)); gap: 18px; }
figure.plot { margin: 0; }
figure.plot svg { display: block; width: 100%; height: auto; border: 1px solid var(--line); border-radius: 6px; }
figure.plot figcaption { color: var(--muted); font-size: 13.5px; margin-top: 6px; }
section > figure.plot { max-width: 760px; }
.row { display: grid; grid-template-columns: repeat(auto-fit, minmax(480px, 1fr)); gap: 18px; margin: 18px 0; }
.row > section { margin: 0; }
.row > section > figure.plot { max-width: none; }
section > figure.plot.wide { max-width: 1000px; }
.placeholder { padding: 18px; border: 1px dashed #b9b4a8; border-radius: 8px; color: var(--muted); background: #faf8f3; }
.placeholder strong { color: var(--ink); }
ul.legend { list-style: none; padding: 0; margin: 8px 0 0; display: flex; flex-wrap: wrap; gap: 6px 16px; font-size: 13.5px; }
.swatch { display: inline-block; width: 12px; height: 12px; border-radius: 3px; margin-right: 6px; vertical-align: -1px; }
.ramp { height: 12px; border-radius: 6px; max-width: 420px; margin-top: 10px; }
.ramp-labels { display: flex; justify-content: space-between; max-width: 420px; font-size: 13px; color: var(--muted); }
.table-wrap { overflow-x: auto; max-height: 640px; overflow-y: auto; border: 1px solid var(--line); border-radius: 6px; }
table { border-collapse: collapse; width: 100%; font-size: 13.5px; font-variant-numeric: tabular-nums; }
th, td { padding: 6px 7px; border-bottom: 1px solid var(--line); text-align: right; white-space: nowrap; }
th { position: sticky; top: 0; background: #f3f1eb; font-weight: 600; font-size: 13px; color: #3b4a50;
  white-space: normal; vertical-align: bottom; }
th.l, td.l { text-align: left; }
tbody tr:nth-child(even) { background: #f8f7f2; }
td.stop { white-space: normal; text-align: left; min-width: 260px; }
tr.stopped td { background: #eef4f1; }
table.grouped { width: auto; min-width: 100%; }
table.grouped th { position: static; }
table.grouped code { font-size: 12px; }
.when { color: var(--muted); font-size: 12px; }
th.group { text-align: center; border-bottom: 1px solid #cfcabd; }
details summary { cursor: pointer; color: var(--accent); }
pre.source { background: #f6f4ee; border: 1px solid var(--line); border-radius: 6px; padding: 12px 14px;
  overflow-x: auto; font: 13px/1.45 ui-monospace, "SFMono-Regular", Menlo, Consolas, monospace; }
code { font: 12.5px ui-monospace, "SFMono-Regular", Menlo, Consolas, monospace; }
footer { color: var(--muted); font-size: 13px; padding: 10px 0 36px; }
"#;

/// The document head: title, inline style, and a reload once a minute while the
/// campaign has not finished.
fn head(c: &Context) -> String {
    // A campaign that has not finished is probably running: the browser reloads the
    // page (which the engine rewrites after each round) once a minute.
    let refresh = if c.finished.is_none() {
        "<meta http-equiv=\"refresh\" content=\"60\">\n"
    } else {
        ""
    };
    format!(
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n\
         <meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n\
         {refresh}<title>{} — tarn campaign report</title>\n<style>{STYLE}</style>\n</head>\n<body>\n",
        escape(&c.meta.campaign)
    )
}

/// The page header: campaign name, system, kT, seed, file hash and path, tarn versions,
/// counts, and where the campaign stands.
fn header(c: &Context) -> String {
    let (system, kt, seed) = match &c.campaign {
        Ok(k) => (
            k.system.label.clone(),
            format!("{} ({})", plots::compact(k.kt), c.energy_unit()),
            k.seed.to_string(),
        ),
        Err(_) => (
            "unknown (campaign file unreadable)".into(),
            "–".into(),
            "–".into(),
        ),
    };
    let hash = &c.version.hash;
    let short: String = hash.chars().take(16).collect();
    let version_note = if c.n_versions > 1 {
        format!(
            " (version {} of {})",
            c.version.index.saturating_add(1),
            c.n_versions
        )
    } else {
        String::new()
    };
    let facts = [
        ("system", escape(&system)),
        ("kT", escape(&kt)),
        ("seed", escape(&seed)),
        (
            "campaign file",
            format!(
                "<code title=\"{h}\">{}</code>{}<br><span title=\"{p}\">{p}</span>",
                escape(&short),
                escape(&version_note),
                h = escape(hash),
                p = escape(&c.version.path)
            ),
        ),
        (
            "tarn",
            format!(
                "store written by {}, report by {}",
                escape(&c.meta.tarn_version),
                env!("CARGO_PKG_VERSION")
            ),
        ),
        ("created", escape(&utc(c.meta.created_unix))),
        ("rounds completed", c.rounds.len().to_string()),
        ("states found", c.states.len().to_string()),
        ("energy evaluations", group(c.total_evals())),
    ];
    let mut out = String::from("<header class=\"top\">\n<div class=\"inner\">\n");
    out.push_str("<div class=\"brand\">tarn · campaign report</div>\n");
    let _ = writeln!(out, "<h1>{}</h1>", escape(&c.meta.campaign));
    let _ = writeln!(
        out,
        "<p class=\"system\">{}</p>",
        escape(&format!("{system} at kT = {kt}"))
    );
    out.push_str("<dl class=\"facts\">\n");
    for (k, v) in facts {
        let _ = writeln!(out, "<div><dt>{k}</dt><dd>{v}</dd></div>");
    }
    out.push_str("</dl>\n");
    out.push_str(&status_line(c));
    out.push_str("</div>\n</header>\n");
    out
}

/// Whether the campaign finished, by which stop rule and why, or that it has not.
fn status_line(c: &Context) -> String {
    let last = c.rounds.last().map_or(0, |r| r.round);
    match &c.finished {
        Some(stop) => format!(
            "<p class=\"status done\" id=\"stop-reason\"><strong>Finished</strong> after round {last} by the stop rule <code>{}</code>: {}</p>\n",
            escape(&stop.rule),
            escape(&stop.reason)
        ),
        None => format!(
            "<p class=\"status\" id=\"stop-reason\"><strong>Not finished.</strong> {} completed; the campaign is running or was interrupted (<code>tarn resume {}</code> continues it). This page reloads itself every minute.</p>\n",
            if last == 0 { "No round".to_string() } else { format!("Round {last}") },
            escape(&c.meta.campaign)
        ),
    }
}

/// A visible note when the stored campaign file cannot be parsed again (an older tarn,
/// a moved base directory): the page then shows only what the store holds by itself.
fn parse_problem(c: &Context) -> String {
    match &c.campaign {
        Ok(_) => String::new(),
        Err(e) => format!(
            "<p class=\"placeholder\"><strong>The stored campaign file could not be read again</strong>, so the system, kT and seed are unknown here: {}</p>\n",
            escape(e)
        ),
    }
}

/// The caution, visible near the top of every report.
fn caution() -> String {
    format!(
        "<aside class=\"caution\" id=\"caution\" role=\"note\"><strong>Caution.</strong> {}</aside>\n",
        escape(CAUTION)
    )
}

/// Links to the sections, so a long report is quick to move through.
fn contents() -> String {
    let links = [
        ("discovery", "Discovery"),
        ("free-energies", "Free energies"),
        ("ess", "Reweighting quality"),
        ("landscape", "Samples"),
        ("profile", "Profile"),
        ("paths", "Paths"),
        ("catalogue", "Catalogue"),
        ("rounds", "Rounds"),
        ("campaign-file", "Campaign file"),
    ];
    let mut out = String::from("<nav class=\"contents\">");
    for (id, label) in links {
        let _ = write!(out, "<a href=\"#{id}\">{label}</a>");
    }
    out.push_str("</nav>\n");
    out
}

/// The discovery timeline: states against rounds and against energy evaluations.
fn discovery(c: &Context) -> anyhow::Result<String> {
    let rounds: Vec<(u32, u32, u32)> = c
        .rounds
        .iter()
        .map(|r| (r.round, r.states_total, r.new_states))
        .collect();
    let by_round = plots::discovery_by_round(
        &rounds,
        Axes {
            x: "round",
            y: "states in the catalogue",
        },
    )?;
    let costs: Vec<u64> = c.states.iter().map(|s| s.found.cost_to_find).collect();
    let by_cost = plots::discovery_by_cost(
        &costs,
        c.total_evals(),
        Axes {
            x: "energy evaluations (cumulative)",
            y: "states found",
        },
    )?;
    let mut out = String::from("<section id=\"discovery\">\n<h2>Discovery</h2>\n");
    out.push_str("<p class=\"lead\">How the catalogue grew: after each round, and against the energy evaluations spent until each state's first sighting (its cost to find). A flat tail says that this search stopped finding states, not that none are left.</p>\n<div class=\"pair\">\n");
    let empty_r = rounds.is_empty().then_some("no round completed yet");
    let empty_c = costs.is_empty().then_some("no state found yet");
    out.push_str(&figure(
        "plot-discovery-round",
        &by_round,
        "states found against round",
        "States in the catalogue after each round; dots mark rounds that found new states.",
        empty_r,
    ));
    out.push_str(&figure(
        "plot-discovery-cost",
        &by_cost,
        "states found against energy evaluations",
        "States found against cumulative energy evaluations; each dot is one state's first sighting.",
        empty_c,
    ));
    out.push_str("</div>\n</section>\n");
    Ok(out)
}

/// Free energies of the states by round, at most [`MAX_FREE_ENERGY_TRACKS`] of them
/// (those of lowest latest free energy), with a legend in HTML.
fn free_energy_section(c: &Context) -> anyhow::Result<String> {
    let mut order: Vec<usize> = (0..c.states.len())
        .filter(|&i| {
            c.states[i]
                .estimates
                .iter()
                .any(|e| e.free_energy.is_finite())
        })
        .collect();
    let latest = |i: usize| {
        c.states[i]
            .estimates
            .iter()
            .rev()
            .find(|e| e.free_energy.is_finite())
            .map_or(f64::INFINITY, |e| e.free_energy)
    };
    order.sort_by(|&a, &b| latest(a).total_cmp(&latest(b)).then(a.cmp(&b)));
    let estimated = order.len();
    order.truncate(MAX_FREE_ENERGY_TRACKS);
    order.sort_unstable();
    let tracks: Vec<StateTrack> = order
        .iter()
        .map(|&i| StateTrack {
            index: i,
            points: c.states[i]
                .estimates
                .iter()
                .map(|e| (f64::from(e.round), e.free_energy, e.free_energy_err))
                .collect(),
        })
        .collect();
    let svg = plots::free_energies(
        &tracks,
        Axes {
            x: "round",
            y: "free energy F [kT]",
        },
    )?;
    let mut out = String::from("<section id=\"free-energies\">\n<h2>Free energies by round</h2>\n");
    out.push_str("<p class=\"lead\">Each state's free energy F = −kT ln P in kT, relative to the most populated state, as estimated in each round, with error bars of one standard error (bootstrap). An estimate that stopped moving is necessary for convergence, not sufficient.</p>\n");
    let shown = if estimated > tracks.len() {
        format!(
            " The {} states of lowest free energy are drawn, of {estimated} estimated.",
            tracks.len()
        )
    } else {
        String::new()
    };
    let empty = tracks.is_empty().then_some("no free-energy estimate yet");
    out.push_str(&figure(
        "plot-free-energy",
        &svg,
        "free energy of each state by round",
        &format!("Free energy [kT] by round, one line per state.{shown}"),
        empty,
    ));
    if !tracks.is_empty() {
        out.push_str("<ul class=\"legend\">");
        for t in &tracks {
            let _ = write!(
                out,
                "<li><span class=\"swatch\" style=\"background:{}\"></span>state {}</li>",
                plots::css(plots::state_colour(t.index)),
                c.states[t.index].id
            );
        }
        out.push_str("</ul>\n");
    }
    if !tracks.is_empty() {
        let cost = pooled_cost_tracks(c, &order);
        let svg = plots::free_energies_by_cost(
            &cost,
            Axes {
                x: "cumulative energy evaluations",
                y: "pooled free energy F [kT]",
            },
        )?;
        out.push_str(&figure(
            "plot-free-energy-cost",
            &svg,
            "pooled free energy of each state against energy evaluations",
            "The cost curve of the answer: after each round, each state's free energy pooled over the rounds so far (inverse-variance mean, error bar scaled by the Birge ratio when the rounds disagree), against the energy evaluations the campaign had spent. The command tarn bench discovery draws the same curve beside plain Metropolis and Langevin.",
            None,
        ));
    }
    out.push_str("</section>\n");
    Ok(out)
}

/// For the states at `order` (catalogue positions), the pooled free energy after each
/// round against the campaign's cumulative energy evaluations; at most 60 rounds are
/// sampled so that a long campaign's report stays cheap to rebuild.
fn pooled_cost_tracks(c: &Context, order: &[usize]) -> Vec<StateTrack> {
    let mut tracks: Vec<StateTrack> = order
        .iter()
        .map(|&i| StateTrack {
            index: i,
            points: Vec::new(),
        })
        .collect();
    for k in plots::thin(c.rounds.len(), 60) {
        let r = &c.rounds[k];
        let upto: Vec<StateRecord> = c
            .states
            .iter()
            .map(|s| {
                let mut s = s.clone();
                s.estimates.retain(|e| e.round <= r.round);
                s
            })
            .collect();
        let pooled = super::pooled_free_energies(&upto);
        for t in &mut tracks {
            if let Some(p) = pooled[t.index] {
                let x = r.cumulative_energy_evals as f64;
                t.points.push((x, p.value, Some(p.err)));
            }
        }
    }
    tracks
}

/// The ESS fraction of each round that has one: the evaluate stage's metric when the
/// campaign names its evaluate stage, otherwise any stage that recorded it.
fn ess_points(c: &Context) -> Vec<(u32, f64)> {
    let stage = c.evaluate_stage();
    c.rounds
        .iter()
        .filter_map(|r| {
            r.stages
                .iter()
                .filter(|s| stage.is_none_or(|name| s.name == name))
                .find_map(|s| s.metrics.get("ess_fraction").copied())
                .map(|f| (r.round, f))
        })
        .collect()
}

/// The ESS fraction by round, or a notice saying there is no evaluation stage.
fn ess_section(c: &Context) -> anyhow::Result<String> {
    let axes = Axes {
        x: "round",
        y: "ESS fraction (Kish ESS / samples)",
    };
    let has_stage = match &c.campaign {
        Ok(k) => k.evaluate.is_some(),
        Err(_) => true,
    };
    let points = ess_points(c);
    let floor = c
        .campaign
        .as_ref()
        .ok()
        .and_then(|k| k.stop.min_ess_fraction);
    let (svg, empty) = if !has_stage {
        (
            plots::notice(plots::SMALL, axes, "no evaluation stage in this campaign")?,
            Some("no evaluation stage"),
        )
    } else if points.is_empty() {
        (
            plots::ess_fraction(&points, floor, axes)?,
            Some("no ESS fraction recorded yet"),
        )
    } else {
        (plots::ess_fraction(&points, floor, axes)?, None)
    };
    let mut out = String::from("<section id=\"ess\">\n<h2>Reweighting quality</h2>\n");
    out.push_str("<p class=\"lead\">The Kish effective sample size of each evaluation as a fraction of the samples drawn from the flow. Importance weights correct the flow's samples only where the flow puts probability; a free energy from a handful of effective samples is not an estimate, whatever its error bar says, and states the flow never visits get no weight at all.</p>\n");
    let caption = match points.iter().map(|p| p.1).reduce(f64::min) {
        Some(min) => format!(
            "ESS fraction by round (lowest {}; below 0.02 the axis is logarithmic).{}",
            plots::compact(min),
            floor.map_or(String::new(), |f| format!(
                " Dashed: the campaign's ESS floor, {} (stop rule min_ess_fraction).",
                plots::compact(f)
            ))
        ),
        None => "ESS fraction by round.".into(),
    };
    out.push_str(&figure(
        "plot-ess",
        &svg,
        "ESS fraction by round",
        &caption,
        empty,
    ));
    out.push_str("</section>\n");
    Ok(out)
}

/// A map from one configuration (a row of `dim` coordinates) to its point in a plot.
type Projection<'a> = &'a dyn Fn(&[f64]) -> (f64, f64);

/// The explore samples a scatter draws, and how they were chosen.
struct ScatterSamples {
    /// (x, y, round) of each drawn sample.
    points: Vec<(f64, f64, u32)>,
    /// Rounds read (at most [`MAX_LANDSCAPE_ROUNDS`], spread over the campaign).
    rounds: usize,
    /// Whether some round had more explore tasks than points to spare, so that not
    /// every walker is drawn.
    walkers_thinned: bool,
}

impl ScatterSamples {
    /// The caption's account of what is drawn: every walker of each round read, unless
    /// a round had more walkers than its share of points.
    fn caption(&self) -> String {
        let walkers = if self.walkers_thinned {
            "walkers evenly thinned in rounds with more walkers than points to spare, "
        } else {
            "every walker of each round, "
        };
        format!(
            "{} samples from {} round(s): {walkers}each walker's samples evenly thinned (at most {MAX_LANDSCAPE_POINTS} in all).",
            self.points.len(),
            self.rounds
        )
    }
}

/// Explore samples for the landscape: at most [`MAX_LANDSCAPE_ROUNDS`] rounds spread over
/// the campaign, every explore task (walker) of each (thinned only when a round has
/// more walkers than its share of points), and evenly strided samples of each task,
/// [`MAX_LANDSCAPE_POINTS`] in all, each row of `dim` coordinates mapped to a point by
/// `project`.
fn landscape_samples(
    store: &Store,
    rounds: &[RoundRecord],
    dim: usize,
    project: Projection,
) -> anyhow::Result<ScatterSamples> {
    let picked = plots::thin(rounds.len(), MAX_LANDSCAPE_ROUNDS);
    let per_round = MAX_LANDSCAPE_POINTS / picked.len().max(1);
    let mut out = Vec::new();
    let mut walkers_thinned = false;
    for &ri in &picked {
        let round = rounds[ri].round;
        let tasks: Vec<TaskRecord> = store
            .round_tasks(round)?
            .into_iter()
            .filter(|t| {
                t.role == Role::Explore
                    && t.status == TaskStatus::Done
                    && t.arrays
                        .get("samples")
                        .is_some_and(|s| s.len() == 2 && s[0] > 0 && s[1] == dim)
            })
            .collect();
        let chosen = plots::thin(tasks.len(), per_round.max(1));
        walkers_thinned |= chosen.len() < tasks.len();
        let per_task = (per_round / chosen.len().max(1)).max(1);
        for &ti in &chosen {
            let t = &tasks[ti];
            let key = keys::task_suffix(t.round, t.stage_index, t.walker);
            let Some(a) = store.array(&key, "samples")? else {
                continue;
            };
            if a.shape.len() != 2 || a.shape[1] != dim || a.data.len() != dim * a.rows() {
                continue;
            }
            for i in plots::thin(a.rows(), per_task) {
                let (x, y) = project(&a.data[dim * i..dim * (i + 1)]);
                if x.is_finite() && y.is_finite() {
                    out.push((x, y, round));
                }
            }
        }
    }
    Ok(ScatterSamples {
        points: out,
        rounds: picked.len(),
        walkers_thinned,
    })
}

/// The plotted rectangle: the samples' and minima's extent, padded by 8 %.
fn landscape_box(
    samples: &[(f64, f64, u32)],
    minima: &[(u32, f64, f64)],
) -> ((f64, f64), (f64, f64)) {
    let xs = samples
        .iter()
        .map(|s| s.0)
        .chain(minima.iter().map(|m| m.1));
    let ys = samples
        .iter()
        .map(|s| s.1)
        .chain(minima.iter().map(|m| m.2));
    let pad = |it: &mut dyn Iterator<Item = f64>| {
        let (lo, hi) = it.fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), v| {
            (a.min(v), b.max(v))
        });
        let w = (hi - lo).max(1e-6);
        (lo - 0.08 * w, hi + 0.08 * w)
    };
    (pad(&mut xs.into_iter()), pad(&mut ys.into_iter()))
}

/// The system's energy on a 160 × 110 grid over the rectangle, for the contour lines;
/// `None` for an external model (a process the report does not start) or a model that
/// cannot be built or evaluated here.
fn energy_grid(system: Option<&SystemSpec>, x: (f64, f64), y: (f64, f64)) -> Option<Grid> {
    let spec = system.filter(|s| !matches!(s, SystemSpec::External { .. }))?;
    let model = spec.build().ok()?;
    let (nx, ny) = (160, 110);
    let points = Grid::points(nx, ny, x, y);
    let mut values = vec![0.0; nx * ny];
    model.evaluate(&points, &mut values, None).ok()?;
    Some(Grid {
        nx,
        ny,
        x,
        y,
        values,
    })
}

/// The sample map of a 2-D system: thinned explore samples coloured by round over the
/// energy's contour lines, with the catalogue's minima; a note for other systems.
fn landscape_section(store: &Store, c: &Context) -> anyhow::Result<String> {
    let mut out =
        String::from("<section id=\"landscape\">\n<h2>Samples over the energy landscape</h2>\n");
    let dim = c.dim();
    if let (Some(d), Some(pair)) = (dim, dihedral_pair(c)) {
        if d != 2 {
            return ramachandran_section(store, c, d, pair, out);
        }
    }
    if dim != Some(2) {
        let why = match dim {
            Some(d) => format!("This system has {d} coordinates; the sample map is drawn for two-dimensional systems only."),
            None => "The system's dimension is unknown (the campaign file could not be read again), so no sample map is drawn.".into(),
        };
        let _ = writeln!(
            out,
            "<p class=\"placeholder\" data-empty=\"not two-dimensional\">{}</p>\n</section>",
            escape(&why)
        );
        return Ok(out);
    }
    let scatter = landscape_samples(store, &c.rounds, 2, &|r| (r[0], r[1]))?;
    let samples = &scatter.points;
    let minima: Vec<(u32, f64, f64)> = c
        .states
        .iter()
        .filter(|s| s.representative.len() == 2)
        .map(|s| (s.id, s.representative[0], s.representative[1]))
        .collect();
    let (bx, by) = landscape_box(samples, &minima);
    let kt = c.campaign.as_ref().map_or(1.0, |k| k.kt);
    let grid = if samples.is_empty() && minima.is_empty() {
        None
    } else {
        energy_grid(c.system.as_ref(), bx, by)
    };
    let (levels, step) = grid
        .as_ref()
        .map(|g| plots::contour_levels(&g.values, kt, 16))
        .unwrap_or_default();
    let r0 = c.rounds.first().map_or(1, |r| r.round);
    let r1 = c.rounds.last().map_or(1, |r| r.round);
    let unit = c.energy_unit();
    let svg = plots::landscape(
        &Landscape {
            grid: grid.as_ref(),
            levels: &levels,
            samples,
            minima: &minima,
            rounds: (r0, r1),
            x: bx,
            y: by,
        },
        Axes {
            x: "coordinate x[0] (model length unit)",
            y: "coordinate x[1] (model length unit)",
        },
    )?;
    out.push_str("<p class=\"lead\">Explore samples coloured by the round that drew them, over contour lines of the system's energy; circles mark the catalogue's minima. The map is a thinned picture, not the data: use <code>tarn export</code> for every sample.</p>\n");
    let contours = match (&grid, &c.system) {
        (Some(_), _) if !levels.is_empty() => format!(
            "Contour lines every {} {unit} ({} kT) from {} {unit} upwards.",
            plots::compact(step),
            plots::compact(step / kt),
            plots::compact(levels[0])
        ),
        (_, Some(SystemSpec::External { .. })) => {
            "No contour lines: the energy is an external model, which the report does not start."
                .into()
        }
        _ => "No contour lines: the system's energy could not be evaluated here.".into(),
    };
    let caption = format!("{} {contours}", scatter.caption());
    let empty = (samples.is_empty() && minima.is_empty()).then_some("no sample stored yet");
    close_round_scatter(
        &mut out,
        "plot-landscape",
        &svg,
        "explore samples coloured by round over energy contours",
        &caption,
        empty,
        (r0, r1),
    );
    Ok(out)
}

/// The end of a sample-scatter section: the wide figure, the round colour ramp under
/// it, and the section's closing tag.
fn close_round_scatter(
    out: &mut String,
    id: &str,
    svg: &str,
    title: &str,
    caption: &str,
    empty: Option<&str>,
    (r0, r1): (u32, u32),
) {
    out.push_str(&figure(id, svg, title, &escape(caption), empty).replacen(
        "class=\"plot\"",
        "class=\"plot wide\"",
        1,
    ));
    let _ = writeln!(
        out,
        "<div class=\"ramp\" style=\"background:{}\"></div><div class=\"ramp-labels\"><span>round {r0}</span><span>colour = round</span><span>round {r1}</span></div>",
        plots::round_ramp_css()
    );
    out.push_str("</section>\n");
}

/// The first two dihedrals of the dedup stage's fingerprint, when it is a dihedral
/// fingerprint (a molecule's φ, ψ), valid for the system's dimension.
fn dihedral_pair(c: &Context) -> Option<[[usize; 4]; 2]> {
    let campaign = c.campaign.as_ref().ok()?;
    let fp = campaign.dedup.params.get("fingerprint")?;
    let fp: Fingerprint = serde_json::from_value(fp.clone()).ok()?;
    fp.validate(campaign.system.dim).ok()?;
    match fp {
        Fingerprint::Dihedrals { dihedrals } if dihedrals.len() >= 2 => {
            Some([dihedrals[0], dihedrals[1]])
        }
        _ => None,
    }
}

/// The Ramachandran scatter of a molecule: thinned explore samples at their first two
/// fingerprint dihedrals (φ, ψ in degrees), coloured by round, with the catalogue's
/// minima; drawn in place of the 2-D landscape.
fn ramachandran_section(
    store: &Store,
    c: &Context,
    dim: usize,
    pair: [[usize; 4]; 2],
    mut out: String,
) -> anyhow::Result<String> {
    let project = |r: &[f64]| (dihedral_degrees(r, pair[0]), dihedral_degrees(r, pair[1]));
    let scatter = landscape_samples(store, &c.rounds, dim, &project)?;
    let samples = &scatter.points;
    let minima: Vec<(u32, f64, f64)> = c
        .states
        .iter()
        .filter(|s| s.representative.len() == dim)
        .map(|s| {
            let (x, y) = project(&s.representative);
            (s.id, x, y)
        })
        .collect();
    let r0 = c.rounds.first().map_or(1, |r| r.round);
    let r1 = c.rounds.last().map_or(1, |r| r.round);
    let name = |d: [usize; 4]| format!("dihedral({},{},{},{}) (degrees)", d[0], d[1], d[2], d[3]);
    let (x_label, y_label) = (
        format!("φ = {}", name(pair[0])),
        format!("ψ = {}", name(pair[1])),
    );
    let svg = plots::landscape(
        &Landscape {
            grid: None,
            levels: &[],
            samples,
            minima: &minima,
            rounds: (r0, r1),
            x: (-180.0, 180.0),
            y: (-180.0, 180.0),
        },
        Axes {
            x: &x_label,
            y: &y_label,
        },
    )?;
    out.push_str("<p class=\"lead\">A Ramachandran scatter: explore samples at the first two dihedrals of the dedup fingerprint, coloured by the round that drew them; circles mark the catalogue's minima. The map is a thinned picture, not the data: use <code>tarn export</code> for every sample.</p>\n");
    let caption = format!("{} Both axes wrap at ±180°.", scatter.caption());
    let empty = (samples.is_empty() && minima.is_empty()).then_some("no sample stored yet");
    close_round_scatter(
        &mut out,
        "plot-ramachandran",
        &svg,
        "explore samples at their backbone dihedrals, coloured by round",
        &caption,
        empty,
        (r0, r1),
    );
    Ok(out)
}

/// A profile found in the store.
struct FoundProfile {
    round: u32,
    task: String,
    /// Names of every `profile*` array the task stored.
    names: Vec<String>,
    /// The profile, when its layout is the one in the module doc.
    data: Option<ProfileData>,
    /// RMS difference to the reference (Boltzmann-mean alignment), if the worker
    /// measured it.
    rms: Option<f64>,
    boltzmann_rms: Option<f64>,
}

/// The newest committed evaluate task's profile arrays, if it stored any.
fn find_profile(store: &Store, c: &Context) -> anyhow::Result<Option<FoundProfile>> {
    // Only the newest round with a committed evaluate task is read: each evaluation
    // draws its profile afresh from the newest flow, so it is the one to show.
    for r in c.rounds.iter().rev() {
        let tasks = store.round_tasks(r.round)?;
        let Some(t) = tasks
            .iter()
            .find(|t| t.role == Role::Evaluate && t.status == TaskStatus::Done)
        else {
            continue;
        };
        let names: Vec<String> = t
            .arrays
            .keys()
            .filter(|k| k.starts_with("profile"))
            .cloned()
            .collect();
        if names.is_empty() {
            return Ok(None);
        }
        let key = keys::task_suffix(t.round, t.stage_index, t.walker);
        let data = match store.array(&key, "profile")? {
            Some(a)
                if a.shape.len() == 2
                    && a.shape[1] == 3
                    && a.shape[0] > 0
                    && a.data.len() == 3 * a.shape[0] =>
            {
                let n = a.shape[0];
                let col = |k: usize| (0..n).map(|i| a.data[3 * i + k]).collect::<Vec<f64>>();
                let (centers, f, err) = (col(0), col(1), col(2));
                let lower = f.iter().zip(&err).map(|(f, e)| f - e).collect();
                let upper = f.iter().zip(&err).map(|(f, e)| f + e).collect();
                let reference = store
                    .array(&key, "profile_reference")?
                    .map(|r| r.data)
                    .filter(|r| r.len() == n);
                Some(ProfileData {
                    centers,
                    free_energy: f,
                    band: Some((lower, upper)),
                    reference,
                })
            }
            _ => None,
        };
        let metric = |name: &str| t.metrics.get(name).copied().flatten();
        return Ok(Some(FoundProfile {
            round: t.round,
            task: t.id.clone(),
            names,
            data,
            rms: metric("profile_rms"),
            boltzmann_rms: metric("profile_boltzmann_rms"),
        }));
    }
    Ok(None)
}

/// A collective variable's description from its campaign-file table, e.g.
/// `{ cv = "coordinate", index = 0 }` reads "coordinate x[0]".
fn cv_label(cv: Option<&serde_json::Value>) -> String {
    let Some(v) = cv else {
        return "collective variable".into();
    };
    if let Some(name) = v.as_str() {
        return name.to_string();
    }
    let name = v
        .get("cv")
        .and_then(|n| n.as_str())
        .unwrap_or("collective variable");
    if name == "coordinate" {
        if let Some(i) = v.get("index").and_then(|i| i.as_u64()) {
            return format!("coordinate x[{i}] (model length unit)");
        }
    }
    let rest: Vec<String> = v
        .as_object()
        .map(|o| {
            o.iter()
                .filter(|(k, _)| k.as_str() != "cv")
                .map(|(k, x)| format!("{k} = {x}"))
                .collect()
        })
        .unwrap_or_default();
    if rest.is_empty() {
        name.to_string()
    } else {
        format!("{name} ({})", rest.join(", "))
    }
}

/// The 1-D profile of the newest evaluation with its reference and RMS difference, or
/// a labelled placeholder when the store holds no profile.
fn profile_section(store: &Store, c: &Context) -> anyhow::Result<String> {
    let mut out = String::from("<section id=\"profile\">\n<h2>Free-energy profile</h2>\n");
    let cv = c
        .campaign
        .as_ref()
        .ok()
        .and_then(|k| k.evaluate.as_ref())
        .and_then(|s| s.params.get("profile"))
        .and_then(|p| p.get("cv"));
    let found = find_profile(store, c)?;
    let Some(found) = found else {
        out.push_str("<p class=\"placeholder\" data-empty=\"no profile in the store\"><strong>No profile data in this campaign's store.</strong> None of its evaluations recorded a 1-D free-energy profile, so none is drawn (an evaluate stage records one when its parameters ask for a <code>profile</code>).</p>\n</section>\n");
        return Ok(out);
    };
    let Some(data) = &found.data else {
        let _ = writeln!(
            out,
            "<p class=\"placeholder\" data-empty=\"profile layout not read\"><strong>Task {} (round {}) stored profile arrays ({}), but not in the layout this report draws</strong> (<code>profile</code> of shape [bins, 3]: centre, F, error), so nothing is drawn.</p>\n</section>",
            escape(&found.task),
            found.round,
            escape(&found.names.join(", "))
        );
        return Ok(out);
    };
    let x = cv_label(cv);
    let svg = plots::profile(
        data,
        Axes {
            x: &x,
            y: "free energy F(s) [kT]",
        },
    )?;
    out.push_str("<p class=\"lead\">The reweighted free-energy profile along a collective variable from the newest evaluation, with a band of one standard error (bootstrap), beside the exact reference where the campaign has one. Each curve has its lowest bin at 0; bins the flow's samples did not reach are left out.</p>\n");
    out.push_str("<div class=\"pair\">\n");
    let reference = if data.reference.is_some() {
        format!(
            " {} line: the exact profile (quadrature).",
            if plots::state_colour(1) == plots::ACCENT {
                "Second"
            } else {
                "Ochre"
            }
        )
    } else {
        " No reference profile was stored.".into()
    };
    out.push_str(&figure(
        "plot-profile",
        &svg,
        "free-energy profile",
        &escape(&format!(
            "Teal: the estimate from task {} (round {}), shaded ±1 standard error.{reference}",
            found.task, found.round
        )),
        None,
    ));
    out.push_str("<div>\n");
    if let (Some(rms), Some(brms)) = (found.rms, found.boltzmann_rms) {
        let _ = writeln!(
            out,
            "<p>Against the reference, over bins within 10 kT of its lowest, after aligning the estimate by its Boltzmann-weighted mean shift: RMS difference <strong>{rms:.3} kT</strong>, Boltzmann-weighted RMS <strong>{brms:.3} kT</strong>.</p>"
        );
    }
    let history: Vec<(u32, f64)> = c
        .rounds
        .iter()
        .filter_map(|r| {
            r.stages
                .iter()
                .find_map(|s| s.metrics.get("profile_boltzmann_rms").copied())
                .map(|v| (r.round, v))
        })
        .collect();
    if history.len() > 1 {
        let cells: Vec<String> = history
            .iter()
            .rev()
            .take(12)
            .map(|(r, v)| format!("<tr><td>{r}</td><td>{v:.3}</td></tr>"))
            .collect();
        let _ = writeln!(
            out,
            "<div class=\"table-wrap\"><table id=\"profile-history\"><thead><tr><th>round</th><th>Boltzmann-weighted RMS to the reference [kT]</th></tr></thead><tbody>{}</tbody></table></div>",
            cells.join("")
        );
    }
    out.push_str("</div>\n</div>\n</section>\n");
    Ok(out)
}

/// Latent paths from the first state found to up to three others: the straight line
/// in the flow's latent space pushed through the flow, energy along it (unrelaxed; the
/// relaxed path and its saddle come from `tarn path --relax`).
fn paths_section(store: &Store, c: &Context) -> anyhow::Result<String> {
    let mut out = String::from("<section id=\"paths\">\n<h2>Latent paths between states</h2>\n");
    let has_model = !store.models()?.is_empty();
    if !has_model || c.states.len() < 2 {
        out.push_str(r#"<p class="placeholder" data-empty="no latent path"><strong>No latent path drawn:</strong> paths need a flow model (a retrain stage that has run) and at least two states.</p>
</section>
"#);
        return Ok(out);
    }
    let kt = c.campaign.as_ref().map(|k| k.kt).unwrap_or(1.0);
    out.push_str(r#"<p class="lead">The straight line between two states' minima in the flow's latent space, pushed through the flow: where the flow has learned the states' surroundings, this is a path of low energy between them, and its highest image estimates the barrier (a path of discrete images can pass just beside the saddle, so it is an estimate, not a bound). <code>tarn path NAME --from A --to B --relax</code> relaxes it into a minimum-energy path and reports the saddle.</p>
<div class="pair">
"#);
    let from = c.states[0].id;
    for to in c.states.iter().skip(1).take(3).map(|s| s.id) {
        let p = match crate::report::path::latent_path(store, from, to, 24, false) {
            Ok(p) => p,
            Err(e) => {
                let _ = writeln!(
                    out,
                    r#"<p class="placeholder" data-empty="path failed">Path {from} → {to}: {}</p>"#,
                    escape(&format!("{e:#}"))
                );
                continue;
            }
        };
        let e0 = p.energies[0];
        let data = plots::ProfileData {
            centers: p.t.clone(),
            free_energy: p.energies.iter().map(|e| (e - e0) / kt).collect(),
            band: None,
            reference: None,
        };
        let svg = plots::profile(
            &data,
            Axes {
                x: "path parameter (0 at the first state, 1 at the second)",
                y: "energy along the path [kT]",
            },
        )?;
        out.push_str(&figure(
            &format!("plot-path-{from}-{to}"),
            &svg,
            &format!("latent path from state {from} to state {to}"),
            &escape(&format!(
                "State {from} → state {to}: highest point {:.4} (image {} of {}), {:.2} kT above state {from}.",
                p.highest,
                p.highest_image,
                p.t.len(),
                (p.highest - e0) / kt
            )),
            None,
        ));
    }
    out.push_str("</div>\n</section>\n");
    Ok(out)
}

/// The catalogue: each state's energy, free energy, minimum (for up to three
/// coordinates), first sighting, cost to find and sightings.
fn catalogue_section(c: &Context) -> String {
    let unit = c.energy_unit();
    let mut out = String::from("<section id=\"catalogue\">\n<h2>Catalogue</h2>\n");
    out.push_str("<p class=\"lead\">Every state found, with its first sighting (its discovery): the round, stage, task, walker, seed and sample that found it, and the energy evaluations the campaign had spent until then.</p>\n");
    if c.states.is_empty() {
        out.push_str("<p class=\"placeholder\">No state found yet.</p>\n</section>\n");
        return out;
    }
    let show_min = c.states.iter().all(|s| s.representative.len() <= 3);
    let _ = write!(
        out,
        "<div class=\"table-wrap\"><table id=\"catalogue-table\" class=\"grouped\">\n<thead><tr><th class=\"l\" rowspan=\"2\">state</th><th rowspan=\"2\">energy [{}]</th><th rowspan=\"2\">F ± error [kT]</th>{}<th class=\"group\" colspan=\"6\">first sighting</th><th rowspan=\"2\">cost to find [energy evaluations]</th><th rowspan=\"2\">sightings</th></tr>\n<tr><th>round</th><th class=\"l\">stage</th><th class=\"l\">task</th><th>walker</th><th>seed</th><th>sample</th></tr></thead>\n<tbody>\n",
        escape(unit),
        if show_min {
            "<th class=\"l\" rowspan=\"2\">minimum</th>"
        } else {
            ""
        }
    );
    for (i, s) in c.states.iter().enumerate() {
        let minimum = if show_min {
            let coords: Vec<String> = s.representative.iter().map(|v| format!("{v:.3}")).collect();
            format!("<td class=\"l\">({})</td>", coords.join(", "))
        } else {
            String::new()
        };
        let est_round = s.estimates.last().map_or(String::new(), |e| {
            format!(
                " <span class=\"when\" title=\"estimated in round {0}\">r{0}</span>",
                e.round
            )
        });
        let _ = writeln!(
            out,
            "<tr><td class=\"l\"><span class=\"swatch\" style=\"background:{}\"></span>{}</td><td>{:.6}</td><td>{}{}</td>{minimum}<td>{}</td><td class=\"l\">{}</td><td class=\"l\"><code>{}</code></td><td>{}</td><td><code>{}</code></td><td>{}</td><td>{}</td><td>{}</td></tr>",
            plots::css(plots::state_colour(i)),
            s.id,
            s.energy,
            free_energy_text(s),
            est_round,
            s.found.round,
            escape(&s.found.stage),
            escape(&s.found.task),
            s.found.walker,
            s.found.seed,
            s.found.sample_index,
            group(s.found.cost_to_find),
            group(s.sightings.values().sum()),
        );
    }
    out.push_str("</tbody></table></div>\n</section>\n");
    out
}

/// The campaign's stop reason and the per-round table.
fn rounds_section(c: &Context) -> String {
    let mut out = String::from("<section id=\"rounds\">\n<h2>Rounds</h2>\n");
    match &c.finished {
        Some(stop) => {
            let _ = writeln!(
                out,
                "<p class=\"lead\"><strong>Stop reason:</strong> {} (rule <code>{}</code>).</p>",
                escape(&stop.reason),
                escape(&stop.rule)
            );
        }
        None => out.push_str(
            "<p class=\"lead\">The campaign has not finished; no stop rule has held yet.</p>\n",
        ),
    }
    if c.rounds.is_empty() {
        out.push_str("<p class=\"placeholder\">No round completed yet.</p>\n</section>\n");
        return out;
    }
    let ess: std::collections::BTreeMap<u32, f64> = ess_points(c).into_iter().collect();
    out.push_str("<div class=\"table-wrap\"><table id=\"rounds-table\">\n<thead><tr><th>round</th><th>new states</th><th>states</th><th>energy evaluations</th><th>cumulative</th><th>CPU&nbsp;s</th><th>wall&nbsp;s</th><th>ESS fraction</th><th class=\"l\">stop reason</th></tr></thead>\n<tbody>\n");
    for r in &c.rounds {
        let stop = r
            .stop
            .as_ref()
            .map(|s| escape(&s.reason))
            .unwrap_or_default();
        let _ = writeln!(
            out,
            "<tr{}><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{:.1}</td><td>{:.1}</td><td>{}</td><td class=\"stop\">{stop}</td></tr>",
            if r.stop.is_some() { " class=\"stopped\"" } else { "" },
            r.round,
            r.new_states,
            r.states_total,
            group(r.energy_evals),
            group(r.cumulative_energy_evals),
            r.cpu_seconds,
            r.wall_seconds,
            ess.get(&r.round).map_or("–".into(), |f| format!("{f:.3}")),
        );
    }
    out.push_str("</tbody></table></div>\n</section>\n");
    out
}

/// The stored campaign file, folded away, for audit.
fn campaign_file_section(c: &Context) -> String {
    format!(
        "<section id=\"campaign-file\">\n<h2>Campaign file</h2>\n<p class=\"lead\">The text this campaign runs with, exactly as stored (SHA-256 <code>{}</code>). A campaign file names the programs it runs; read one from elsewhere before running it.</p>\n<details><summary>show {}</summary>\n<pre class=\"source\">{}</pre>\n</details>\n</section>\n",
        escape(&c.version.hash),
        escape(&c.version.path),
        escape(&c.version.text)
    )
}

/// The footer: what wrote the page, from which round, and the caution again.
fn footer(c: &Context) -> String {
    format!(
        "<footer><div class=\"inner\">Written by tarn {} from the store of campaign {} after round {}. Self-contained: no network, no scripts. {}</div></footer>\n",
        env!("CARGO_PKG_VERSION"),
        escape(&c.meta.campaign),
        c.rounds.last().map_or(0, |r| r.round),
        escape(CAUTION)
    )
}
