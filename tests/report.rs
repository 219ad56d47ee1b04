//! The campaign report (`tarn::report::html`): a real campaign run through the `tarn`
//! binary, its report rendered from the store, and the page checked as text and, where
//! Chromium is installed (always in CI, which sets `TARN_REQUIRE_BROWSER=1`), as a page
//! loaded by a real browser.

mod common;

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::Command;

use tarn::protocol::{Array, Role};
use tarn::report::html::{self, escape, CAUTION, MAX_LANDSCAPE_POINTS};
use tarn::report::plots::{contour_levels, contour_lines, thin, Grid};
use tarn::store::{
    keys, Batch, CampaignVersion, Estimate, Meta, RoundRecord, Sighting, StageTotals, StateRecord,
    StopDecision, Store, TaskRecord, TaskStatus, SCHEMA_VERSION,
};

/// The sections every report has, by element id.
const SECTIONS: [&str; 9] = [
    "discovery",
    "free-energies",
    "ess",
    "landscape",
    "profile",
    "paths",
    "catalogue",
    "rounds",
    "campaign-file",
];

/// The plots of a 2-D campaign with an evaluate stage, by figure id.
const PLOTS: [&str; 5] = [
    "plot-discovery-round",
    "plot-discovery-cost",
    "plot-free-energy",
    "plot-ess",
    "plot-landscape",
];

/// The plots a report of `store` must draw: [`PLOTS`], and the profile when the newest
/// evaluate task stored one (the shipped flow campaign asks for one).
fn expected_plots(store: &Store) -> Vec<String> {
    let mut want: Vec<String> = PLOTS.iter().map(|s| s.to_string()).collect();
    if stored_profile(store) {
        want.push("plot-profile".into());
    }
    // The cost curve of the pooled free energies, once any state has an estimate.
    let states = store.states().unwrap();
    if states.iter().any(|s| !s.estimates.is_empty()) {
        want.push("plot-free-energy-cost".into());
    }
    // Latent paths from the first state to up to three others, when a flow exists.
    if !store.models().unwrap().is_empty() && states.len() >= 2 {
        for s in states.iter().skip(1).take(3) {
            want.push(format!("plot-path-{}-{}", states[0].id, s.id));
        }
    }
    want
}

/// Whether the newest round's evaluate task stored a `profile` array.
fn stored_profile(store: &Store) -> bool {
    let last = store.last_round().unwrap().expect("a round");
    store
        .round_tasks(last.round)
        .unwrap()
        .iter()
        .any(|t| t.role == Role::Evaluate && t.arrays.contains_key("profile"))
}

/// Runs the shipped 2-D flow campaign (it has an evaluate stage) to its end and returns
/// the environment and the campaign's store directory.
fn flow_campaign() -> (common::Env, PathBuf) {
    let env = common::Env::new();
    let file = common::repo().join("workflows/muller-brown-flow.toml");
    env.tarn(&["run", file.to_str().expect("utf-8 path")])
        .code(0);
    let dir = env.state().join("ridge-flow");
    (env, dir)
}

/// The text of the element with `id` up to its closing `</tag>`.
fn element<'a>(html: &'a str, tag: &str, id: &str) -> &'a str {
    let open = format!("<{tag} ");
    let marker = format!("id=\"{id}\"");
    let at = html
        .match_indices(&open)
        .map(|(i, _)| i)
        .find(|&i| {
            html[i..]
                .split('>')
                .next()
                .is_some_and(|t| t.contains(&marker))
        })
        .unwrap_or_else(|| panic!("no <{tag} id=\"{id}\"> in the report"));
    let close = format!("</{tag}>");
    let end = html[at..]
        .find(&close)
        .unwrap_or_else(|| panic!("<{tag} id=\"{id}\"> is not closed"));
    &html[at..at + end + close.len()]
}

/// The `<svg>…</svg>` elements of a text.
fn svgs(text: &str) -> Vec<&str> {
    text.match_indices("<svg")
        .map(|(i, _)| {
            let end = text[i..].find("</svg>").expect("svg closed");
            &text[i..i + end + 6]
        })
        .collect()
}

/// The ids of the figures of a page, in order.
fn figure_ids(html: &str) -> Vec<&str> {
    html.match_indices("<figure class=\"plot")
        .filter_map(|(i, _)| html[i..].split("id=\"").nth(1)?.split('"').next())
        .collect()
}

/// Number of data-drawing elements (lines, marks, polygons) in an SVG.
fn drawing_elements(svg: &str) -> usize {
    ["<path", "<circle", "<polyline", "<polygon"]
        .iter()
        .map(|t| svg.matches(t).count())
        .sum()
}

#[test]
fn the_report_of_a_2d_flow_campaign_has_every_section_and_every_plot_is_drawn() {
    let (env, dir) = flow_campaign();
    let store = Store::open(&dir).expect("open store");
    let out = env.path().join("report.html");
    html::write_report(&store, &out).expect("write report");
    let page = std::fs::read_to_string(&out).expect("read report");

    for id in SECTIONS {
        element(&page, "section", id);
    }
    assert!(page.contains(&escape(CAUTION)), "the caution is missing");
    element(&page, "aside", "caution");

    // Every plot is present, drawn (not a notice), and carries data marks.
    let plots = expected_plots(&store);
    for id in plots.iter().map(String::as_str) {
        let fig = element(&page, "figure", id);
        assert!(!fig.contains("data-empty"), "{id} is a notice: {fig:.400}");
        let s = svgs(fig);
        assert_eq!(s.len(), 1, "{id} has {} svg elements", s.len());
        assert!(drawing_elements(s[0]) > 0, "{id} draws nothing");
    }
    assert_eq!(
        svgs(&page).len(),
        plots.len(),
        "svg elements besides {plots:?}: figures {:?}",
        figure_ids(&page)
    );

    // Axis labels with units.
    for label in [
        "round",
        "energy evaluations (cumulative)",
        "free energy F [kT]",
        "ESS fraction (Kish ESS / samples)",
        "coordinate x[0] (model length unit)",
    ] {
        assert!(
            page.contains(&format!(">\n{label}\n</text>")),
            "axis label {label} missing"
        );
    }

    // The catalogue table has one row per state, with each state's first sighting and
    // cost as the store holds them.
    let states = store.states().unwrap();
    assert!(
        states.len() >= 2,
        "the campaign found {} states",
        states.len()
    );
    let table = element(&page, "table", "catalogue-table");
    assert_eq!(table.matches("<tr>").count(), states.len() + 2);
    for s in &states {
        assert!(table.contains(&format!("<code>{}</code>", escape(&s.found.task))));
        assert!(table.contains(&format!("<td><code>{}</code></td>", s.found.seed)));
    }

    // The rounds table has one row per round; the campaign finished and says why.
    let rounds = store.rounds().unwrap();
    let table = element(&page, "table", "rounds-table");
    assert_eq!(table.matches("<tr").count(), rounds.len() + 1);
    let stop = store.finished().unwrap().expect("the campaign finished");
    assert!(element(&page, "p", "stop-reason").contains(&escape(&stop.reason)));

    // The landscape draws the evaluated contours and a bounded number of samples.
    let land = element(&page, "figure", "plot-landscape");
    assert!(land.contains("<polyline"), "no contour lines");
    let circles = land.matches("<circle").count();
    assert!(
        circles > states.len() && circles <= MAX_LANDSCAPE_POINTS + states.len(),
        "{circles} circles in the landscape"
    );

    // The profile section draws the stored profile and its reference (two lines), or
    // is a labelled placeholder when the store holds none.
    let profile = element(&page, "section", "profile");
    if stored_profile(&store) {
        let fig = element(&page, "figure", "plot-profile");
        assert!(
            fig.matches("<polyline").count() >= 2,
            "profile without its reference"
        );
        assert!(fig.contains("<polygon"), "profile without its error band");
        assert!(!profile.contains("No profile data"));
    } else {
        assert!(profile.contains("No profile data"));
    }

    // Self-contained: nothing is fetched, nothing runs.
    for banned in ["<script", "<link", "src=", "url(", "@import", "href=\"http"] {
        assert!(!page.contains(banned), "the report contains {banned}");
    }

    // Rendering is a function of the store alone.
    assert_eq!(html::render(&store).unwrap(), page);
}

#[test]
fn escape_neutralises_markup_from_files() {
    assert_eq!(
        escape("<script>alert('x')</script> & \"q\""),
        "&lt;script&gt;alert(&#39;x&#39;)&lt;/script&gt; &amp; &quot;q&quot;"
    );
    assert_eq!(escape("plain — ± ü"), "plain — ± ü");
}

/// A synthetic store (states only when `n_rounds` is at least 1): `n_rounds` rounds of a 2-D Müller–Brown campaign without an
/// evaluate stage in its file but with free-energy estimates, `n_samples` explore
/// samples per round from two walkers, and a stop reason that carries markup.
fn synthetic_store(dir: &Path, n_rounds: u32, n_samples: usize) -> Store {
    synthetic_store_with(dir, n_rounds, n_samples, false, MULLER_BROWN)
}

/// The `[system]` table of the synthetic campaigns.
const MULLER_BROWN: &str = "model = \"muller-brown\"";

/// [`synthetic_store`], with (`evaluate`) an evaluate stage that records an ESS fraction
/// of 0.1 + 0.05 per round (capped at 0.9) and an ESS floor of 0.05 in the stop rules.
fn synthetic_store_with(
    dir: &Path,
    n_rounds: u32,
    n_samples: usize,
    evaluate: bool,
    system: &str,
) -> Store {
    let mut text = format!("name = \"synthetic\"\nseed = 3\nkT = 10.0\n[system]\n{system}\n[start]\npoints = [[-0.558, 1.442]]\n[[explore]]\nname = \"hot\"\nkind = \"metropolis\"\nwalkers = 2\n[dedup]\nkind = \"quench\"\n"
    );
    if evaluate {
        text.push_str("[retrain]\nkind = \"realnvp\"\n[evaluate]\nkind = \"reweight\"\n[stop]\nmax_rounds = 2000\nmin_ess_fraction = 0.05\n");
    } else {
        text.push_str("[stop]\nmax_rounds = 2000\n");
    }
    let meta = Meta {
        v: SCHEMA_VERSION,
        campaign: "synthetic".into(),
        created_unix: 1_796_083_200.0,
        tarn_version: "test".into(),
        base_dir: dir.display().to_string(),
    };
    let version = CampaignVersion {
        v: SCHEMA_VERSION,
        index: 0,
        hash: "ab".repeat(32),
        text,
        // Markup in stored text: the page must show it, escaped.
        path: "syn<script>x</script>thetic.toml".into(),
        accepted_unix: 0.0,
    };
    let store = Store::create(dir, &meta, &version).expect("create");
    let minima = [
        (-0.558, 1.442, -146.7),
        (0.623, 0.028, -108.2),
        (-0.050, 0.467, -80.8),
    ];
    let mut cumulative = 0u64;
    let mut estimates: Vec<Vec<Estimate>> = vec![Vec::new(); 3];
    for r in 1..=n_rounds {
        let mut b = Batch::default();
        for w in 0..2u32 {
            let (cx, cy, _) = minima[((r + w) % 3) as usize];
            let data: Vec<f64> = (0..n_samples)
                .flat_map(|i| {
                    let a = i as f64 * 0.61 + f64::from(r);
                    [cx + 0.1 * a.sin(), cy + 0.1 * (1.3 * a).cos()]
                })
                .collect();
            let key = keys::task_suffix(r, 0, w);
            b.put_array(&key, "samples", &Array::matrix(n_samples, 2, data));
            let task = TaskRecord {
                v: SCHEMA_VERSION,
                id: format!("r{r:04}.hot.w{w:03}"),
                round: r,
                stage: "hot".into(),
                stage_index: 0,
                role: Role::Explore,
                kind: Some("metropolis".into()),
                walker: w,
                seed: u64::from(r * 10 + w),
                status: TaskStatus::Done,
                attempts: vec![],
                metrics: BTreeMap::new(),
                energy_evals: 1000,
                arrays: BTreeMap::from([("samples".to_string(), vec![n_samples, 2])]),
                model_sha256: None,
            };
            b.put(keys::task(r, 0, w), &task);
        }
        cumulative += 2000;
        for (k, e) in estimates.iter_mut().enumerate() {
            if r as usize > k {
                e.push(Estimate {
                    round: r,
                    free_energy: 2.0 * k as f64 + 0.5 * (f64::from(r) * 0.1).sin() * (k as f64),
                    free_energy_err: Some(0.1 + 0.05 * k as f64),
                });
            }
        }
        let stop = (r == n_rounds).then(|| StopDecision {
            rule: "max_rounds".into(),
            reason: "<script>alert(1)</script> reached".into(),
        });
        let mut stages = vec![StageTotals {
            name: "hot".into(),
            tasks: 2,
            samples: 2 * n_samples as u64,
            energy_evals: 2000,
            ..StageTotals::default()
        }];
        if evaluate {
            stages.push(StageTotals {
                name: "evaluate".into(),
                tasks: 1,
                metrics: BTreeMap::from([(
                    "ess_fraction".to_string(),
                    (0.1 + 0.05 * f64::from(r)).min(0.9),
                )]),
                ..StageTotals::default()
            });
        }
        // Built from JSON so that fields the store gains later with defaults need no
        // change here.
        let round: RoundRecord = serde_json::from_value(serde_json::json!({
            "v": SCHEMA_VERSION,
            "round": r,
            "stages": stages,
            "new_states": u32::from(r <= 3),
            "states_total": r.min(3),
            "energy_evals": 2000,
            "cumulative_energy_evals": cumulative,
            "cpu_seconds": 0.1,
            "wall_seconds": 0.1,
            "finished_unix": 0.0,
            "stop": stop,
        }))
        .expect("round record");
        b.put(keys::round(r), &round);
        if let Some(stop) = &stop {
            Store::put_finished(&mut b, Some(stop));
        }
        store.apply(b).expect("apply");
    }
    if n_rounds == 0 {
        return store;
    }
    let mut b = Batch::default();
    for (k, &(x, y, e)) in minima.iter().enumerate() {
        let found_round = k as u32 + 1;
        let s = StateRecord {
            v: SCHEMA_VERSION,
            id: k as u32,
            energy: e,
            representative: vec![x, y],
            found: Sighting {
                round: found_round,
                stage: if k == 2 {
                    "hot<img src=x>".into()
                } else {
                    "hot".into()
                },
                task: format!("r{found_round:04}.hot.w000"),
                walker: 0,
                seed: u64::from(found_round * 10),
                sample_index: 7,
                cost_to_find: u64::from(found_round) * 2000 - 1000,
            },
            sightings: BTreeMap::from([(found_round, 5)]),
            estimates: estimates[k].clone(),
        };
        b.put(keys::state(k as u32), &s);
    }
    store.apply(b).expect("apply states");
    store
}

#[test]
fn a_campaign_without_an_evaluate_stage_says_so_and_escapes_stored_text() {
    let dir = tempfile::tempdir().unwrap();
    let store = synthetic_store(dir.path(), 12, 300);
    let page = html::render(&store).expect("render");
    let ess = element(&page, "figure", "plot-ess");
    assert!(
        ess.contains("data-empty=\"no evaluation stage\""),
        "{ess:.300}"
    );
    assert!(ess.contains("no evaluation stage in this campaign"));
    // The stop reason came from the store with markup in it; it is shown, escaped.
    assert!(!page.contains("<script"));
    assert!(page.contains("&lt;script&gt;alert(1)&lt;/script&gt; reached"));
    assert!(page.contains("syn&lt;script&gt;x&lt;/script&gt;thetic.toml"));
    assert!(!page.contains("<img"));
    assert!(element(&page, "table", "catalogue-table").contains("hot&lt;img src=x&gt;"));
    // The other plots are drawn.
    for id in [
        "plot-discovery-round",
        "plot-discovery-cost",
        "plot-free-energy",
        "plot-landscape",
    ] {
        let fig = element(&page, "figure", id);
        assert!(!fig.contains("data-empty"), "{id} is a notice");
        assert!(drawing_elements(fig) > 0, "{id} draws nothing");
    }
}

#[test]
fn the_ess_plot_draws_every_round_and_the_campaign_s_ess_floor() {
    let dir = tempfile::tempdir().unwrap();
    let store = synthetic_store_with(dir.path(), 8, 50, true, MULLER_BROWN);
    let page = html::render(&store).expect("render");
    let fig = element(&page, "figure", "plot-ess");
    assert!(!fig.contains("data-empty"), "{fig:.300}");
    // One mark per round with an ESS fraction, and the floor in the caption.
    assert_eq!(fig.matches("<circle").count(), 8);
    assert!(fig.contains("ESS floor, 0.05"), "{fig:.2000}");
    // The floor is a dashed line across the chart: many short strokes besides the
    // series' own line.
    assert!(
        fig.matches("<polyline").count() > 10,
        "no dashed floor line"
    );
    // The rounds table shows each round's fraction.
    let table = element(&page, "table", "rounds-table");
    assert!(table.contains("<td>0.150</td>") && table.contains("<td>0.500</td>"));
}

#[test]
fn a_2d_external_model_gets_its_samples_drawn_without_contours() {
    // The report never starts a user's program: an external model's map has samples and
    // minima but no contour lines, and says why.
    let dir = tempfile::tempdir().unwrap();
    let system = "model = \"external\"\ncommand = [\"python3\", \"energy.py\"]\ndim = 2";
    let store = synthetic_store_with(dir.path(), 5, 100, false, system);
    let page = html::render(&store).expect("render");
    assert!(
        !page.contains("could not be read again"),
        "the campaign did not parse"
    );
    let fig = element(&page, "figure", "plot-landscape");
    assert!(!fig.contains("data-empty"));
    assert!(fig.matches("<circle").count() >= 5 * 100, "samples missing");
    assert!(fig.contains("No contour lines: the energy is an external model"));
    // Contours are the only grey-blue polylines; there are none.
    assert!(
        !fig.contains("stroke=\"#8F9EA8\""),
        "contours drawn for an external model"
    );
    let mb_dir = tempfile::tempdir().unwrap();
    let mb = synthetic_store(mb_dir.path(), 5, 100);
    let mb_page = html::render(&mb).expect("render");
    assert!(element(&mb_page, "figure", "plot-landscape").contains("stroke=\"#8F9EA8\""));
}

#[test]
fn a_campaign_with_no_round_yet_renders_notices_not_errors() {
    // What the engine's first refresh (or `tarn report` right after `tarn run` started)
    // sees: a store with its campaign file and nothing else.
    let dir = tempfile::tempdir().unwrap();
    let store = synthetic_store(dir.path(), 0, 0);
    let page = html::render(&store).expect("render");
    for id in SECTIONS {
        element(&page, "section", id);
    }
    for (id, why) in [
        ("plot-discovery-round", "no round completed yet"),
        ("plot-free-energy", "no free-energy estimate yet"),
        ("plot-ess", "no evaluation stage"),
    ] {
        let fig = element(&page, "figure", id);
        assert!(
            fig.contains(&format!("data-empty=\"{why}\"")),
            "{id}: {fig:.300}"
        );
    }
    assert!(element(&page, "p", "stop-reason").contains("Not finished"));
    // A campaign that has not finished reloads itself, so an open page follows it.
    assert!(page.contains("http-equiv=\"refresh\""));
}

#[test]
fn a_long_campaign_renders_a_bounded_page() {
    // 1000 rounds of 2000 samples each (4 million samples): the report reads a thinned
    // subset, so the page stays small. The time is printed, not asserted (speed
    // targets are benchmarks here, never timed tests).
    let dir = tempfile::tempdir().unwrap();
    let store = synthetic_store(dir.path(), 1000, 2000);
    let t = std::time::Instant::now();
    let page = html::render(&store).expect("render");
    let elapsed = t.elapsed();
    eprintln!(
        "report of 1000 rounds: {:.3} s, {} kB",
        elapsed.as_secs_f64(),
        page.len() / 1024
    );
    let land = element(&page, "figure", "plot-landscape");
    assert!(land.matches("<circle").count() <= MAX_LANDSCAPE_POINTS + 3);
    let fe = element(&page, "figure", "plot-free-energy");
    // Error bars are thinned to at most 60 per state.
    assert!(
        fe.matches("<circle").count() <= 3 * 60,
        "free-energy marks not thinned"
    );
    assert!(page.len() < 2 << 20, "report of {} bytes", page.len());
    assert_eq!(
        element(&page, "table", "rounds-table")
            .matches("<tr")
            .count(),
        1001
    );
}

#[test]
fn contour_of_a_paraboloid_is_one_closed_circle() {
    // f = x² + y² on [-2, 2]²: the level set f = 1 is the unit circle (exact). Linear
    // interpolation along cell edges of width h misplaces a crossing by at most
    // h²/(8 r) for this f, here 0.05²/8 < 4e-4.
    let n = 81;
    let values: Vec<f64> = Grid::points(n, n, (-2.0, 2.0), (-2.0, 2.0))
        .chunks(2)
        .map(|p| p[0] * p[0] + p[1] * p[1])
        .collect();
    let grid = Grid {
        nx: n,
        ny: n,
        x: (-2.0, 2.0),
        y: (-2.0, 2.0),
        values,
    };
    let lines = contour_lines(&grid, 1.0);
    assert_eq!(lines.len(), 1, "{} lines", lines.len());
    let line = &lines[0];
    assert_eq!(line.first(), line.last(), "the circle is not closed");
    assert!(line.len() > 100);
    for &(x, y) in line {
        let r = (x * x + y * y).sqrt();
        assert!((r - 1.0).abs() < 4e-4, "point at radius {r}");
    }
}

#[test]
fn contour_of_a_plane_is_one_straight_open_line() {
    // f = x: the level 0.3 is the vertical line x = 0.3 from bottom to top (exact,
    // linear interpolation is exact for a linear function).
    let (nx, ny) = (30, 20);
    let values: Vec<f64> = Grid::points(nx, ny, (0.0, 1.0), (0.0, 2.0))
        .chunks(2)
        .map(|p| p[0])
        .collect();
    let grid = Grid {
        nx,
        ny,
        x: (0.0, 1.0),
        y: (0.0, 2.0),
        values,
    };
    let lines = contour_lines(&grid, 0.3);
    assert_eq!(lines.len(), 1);
    let line = &lines[0];
    assert_eq!(line.len(), ny);
    for &(x, _) in line {
        assert!((x - 0.3).abs() < 1e-12, "x = {x}");
    }
    let ys: Vec<f64> = line.iter().map(|p| p.1).collect();
    assert!((ys[0] - 0.0).abs() < 1e-12 || (ys[0] - 2.0).abs() < 1e-12);
    assert!((ys[0] - ys[ny - 1]).abs() > 1.999);
}

#[test]
fn contour_levels_are_whole_kt_steps_above_the_minimum() {
    let values: Vec<f64> = (0..1000).map(|i| -100.0 + f64::from(i)).collect();
    let (levels, step) = contour_levels(&values, 10.0, 16);
    assert_eq!(step % 10.0, 0.0);
    assert!(!levels.is_empty() && levels.len() <= 16);
    assert!(levels[0] > -100.0 && levels[0] < -100.0 + step);
    assert!(*levels.last().unwrap() <= -100.0 + 24.0 * 10.0);
}

#[test]
fn thinning_keeps_the_ends_and_the_bound() {
    assert_eq!(thin(5, 10), vec![0, 1, 2, 3, 4]);
    let t = thin(1000, 40);
    assert_eq!(t.len(), 40);
    assert_eq!((t[0], t[39]), (0, 999));
    assert!(t.windows(2).all(|w| w[0] < w[1]));
    assert_eq!(thin(10, 1), vec![9]);
    assert!(thin(10, 0).is_empty());
}

/// Where Chromium is, if installed.
fn chromium() -> Option<PathBuf> {
    ["/usr/bin/chromium", "/usr/bin/chromium-browser"]
        .iter()
        .map(PathBuf::from)
        .find(|p| p.exists())
}

/// Runs headless Chromium on `url` with `extra` arguments and a fresh profile; returns
/// (stdout, stderr).
fn run_chromium(bin: &Path, url: &str, extra: &[String]) -> (String, String) {
    let profile = tempfile::tempdir().expect("profile dir");
    let mut cmd = Command::new(bin);
    cmd.args([
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-quic",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        "--enable-logging=stderr",
        "--v=0",
    ])
    .arg(format!("--user-data-dir={}", profile.path().display()))
    .args(extra)
    .arg(url);
    let out = cmd.output().expect("start chromium");
    assert!(
        out.status.success(),
        "chromium failed ({}):\n{}",
        out.status,
        String::from_utf8_lossy(&out.stderr)
    );
    (
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

/// Lines of Chromium's log that report a page problem: console messages and uncaught
/// errors.
fn console_errors(stderr: &str) -> Vec<&str> {
    stderr
        .lines()
        .filter(|l| l.contains("CONSOLE") || l.contains("Uncaught"))
        .collect()
}

#[test]
fn the_report_loads_in_headless_chromium_with_every_plot_and_no_console_error() {
    let required = std::env::var("TARN_REQUIRE_BROWSER").is_ok_and(|v| v == "1");
    let Some(bin) = chromium() else {
        assert!(
            !required,
            "TARN_REQUIRE_BROWSER=1 but chromium is not installed (apt-get install chromium)"
        );
        eprintln!("SKIPPED: chromium not installed (the browser check of the report did not run)");
        return;
    };
    let (env, dir) = flow_campaign();
    let store = Store::open(&dir).expect("open store");
    let report = env.path().join("report.html");
    html::write_report(&store, &report).expect("write report");
    drop(store);
    let url = format!("file://{}", report.display());

    let (dom, stderr) = run_chromium(&bin, &url, &["--dump-dom".to_string()]);
    let errors = console_errors(&stderr);
    assert!(errors.is_empty(), "console errors:\n{}", errors.join("\n"));
    for id in SECTIONS {
        element(&dom, "section", id);
    }
    let plots = expected_plots(&Store::open(&dir).expect("reopen store"));
    let all = svgs(&dom);
    assert_eq!(
        all.len(),
        plots.len(),
        "the browser's DOM has {} svg elements, figures {:?}",
        all.len(),
        figure_ids(&dom)
    );
    for id in plots.iter().map(String::as_str) {
        let fig = element(&dom, "figure", id);
        let s = svgs(fig);
        assert_eq!(s.len(), 1, "{id}: {} svg elements in the DOM", s.len());
        assert!(drawing_elements(s[0]) > 0, "{id} is empty in the DOM");
    }
    assert!(
        dom.contains("Decisions that affect people"),
        "the caution is not in the DOM"
    );

    let shots = common::repo().join("target");
    std::fs::create_dir_all(&shots).expect("target dir");
    let shot = shots.join("report-screenshot.png");
    std::fs::copy(&report, shots.join("report-screenshot.html")).expect("keep the page");
    let (_, stderr) = run_chromium(
        &bin,
        &url,
        &[
            format!("--screenshot={}", shot.display()),
            "--window-size=1280,2400".to_string(),
            "--hide-scrollbars".to_string(),
        ],
    );
    let errors = console_errors(&stderr);
    assert!(errors.is_empty(), "console errors:\n{}", errors.join("\n"));
    let png = std::fs::read(&shot).expect("screenshot written");
    assert!(
        png.starts_with(b"\x89PNG") && png.len() > 10_000,
        "screenshot of {} bytes",
        png.len()
    );
    eprintln!("screenshot of the report: {}", shot.display());
}
