//! Built-in campaign templates for `tarn new`: the files under `workflows/`, embedded,
//! so that the template a user starts from is the campaign the project tests.

/// A template: its name, a one-line summary, and the commented campaign file.
pub struct Template {
    pub name: &'static str,
    pub summary: &'static str,
    pub text: &'static str,
}

/// Every template, in the order `tarn new --list` shows them.
pub const TEMPLATES: &[Template] = &[Template {
    name: "muller-brown",
    summary: "a particle on the Müller–Brown surface: three basins, found by hot Langevin walkers",
    text: include_str!("../../workflows/muller-brown.toml"),
}];
