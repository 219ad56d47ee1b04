//! Built-in campaign templates for `tarn new`: the files under `workflows/`, embedded,
//! so that the template a user starts from is the campaign the project tests.

/// A template: its name, a one-line summary, and the commented campaign file.
pub struct Template {
    pub name: &'static str,
    pub summary: &'static str,
    pub text: &'static str,
}

/// Every template, in the order `tarn new --list` shows them.
pub const TEMPLATES: &[Template] = &[
    Template {
        name: "muller-brown",
        summary: "a tracer on a corrugated surface (Müller–Brown): hot Langevin walkers and quench",
        text: include_str!("../../workflows/muller-brown.toml"),
    },
    Template {
        name: "muller-brown-flow",
        summary: "the same surface explored by a Boltzmann generator (RealNVP, latent Metropolis, reweighting)",
        text: include_str!("../../workflows/muller-brown-flow.toml"),
    },
    Template {
        name: "double-well",
        summary: "a two-state molecular switch: flow-reweighted free energies from a wrong start ratio",
        text: include_str!("../../workflows/double-well.toml"),
    },
    Template {
        name: "lj7-surface",
        summary: "seven rare-gas atoms on a flat surface (2-D Lennard-Jones): four minima by hot Langevin",
        text: include_str!("../../workflows/lj7-surface.toml"),
    },
    Template {
        name: "lj7-surface-flow",
        summary: "the same cluster by a Boltzmann generator: latent Metropolis finds what cold Langevin cannot",
        text: include_str!("../../workflows/lj7-surface-flow.toml"),
    },
    Template {
        name: "phi4-lattice",
        summary: "a ferromagnetic film (8x8 lattice phi^4, broken phase): metadynamics on the magnetisation",
        text: include_str!("../../workflows/phi4-lattice.toml"),
    },
    Template {
        name: "phi4-flow",
        summary: "a lattice field (8x8 phi^4, symmetric phase) sampled by a checkerboard flow: ESS and reweighted averages",
        text: include_str!("../../workflows/phi4-flow.toml"),
    },
];

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_template_is_a_valid_campaign() {
        for t in TEMPLATES {
            let dir = std::path::Path::new(concat!(env!("CARGO_MANIFEST_DIR"), "/workflows"));
            crate::spec::Campaign::parse(t.name, t.text, dir)
                .unwrap_or_else(|e| panic!("template {}: {e}", t.name));
        }
    }
}
