//! The fitted model in plain words, beside the compact label
//! (`separable V 1-32-32-1 tanh, T quadratic`): what the energy is made of
//! and which terms move energy in or out.

use crate::deploy::blob::{BlobModel, Energy, Kinetic, Mlp, PortTerm};

/// A network of `of` with its hidden widths and activation: "network of
/// the positions, 32-32, tanh".
fn network(m: &Mlp, of: &str) -> String {
    let w = m.widths();
    let hidden: Vec<String> = w
        .iter()
        .skip(1)
        .take(w.len().saturating_sub(2))
        .map(|v| v.to_string())
        .collect();
    let act = format!("{:?}", m.activation).to_lowercase();
    if hidden.is_empty() {
        format!("linear function of the {of}")
    } else {
        format!("network of the {of}, {}, {act}", hidden.join("-"))
    }
}

/// The energy and its port terms in plain language, e.g. "energy = kinetic
/// (learned constant mass) + potential (network 32-32, tanh)".
pub fn plain_description(m: &BlobModel) -> String {
    let mut text = match &m.energy {
        Energy::General(net) => format!(
            "energy = one function of positions and momenta together ({})",
            network(net, "positions and momenta")
        ),
        Energy::Mechanical {
            factor, potential, ..
        } => format!(
            "energy = kinetic (learned mass matrix that depends on the positions, its inverse's \
             factor a {}) + potential ({})",
            network(factor, "positions"),
            network(potential, "positions")
        ),
        Energy::Separable { potential, kinetic } => {
            let kin = match kinetic {
                Kinetic::Quadratic(_) => "learned constant mass".to_string(),
                Kinetic::Network(k) => network(k, "momenta"),
            };
            format!(
                "energy = kinetic ({kin}) + potential ({})",
                network(potential, "positions")
            )
        }
    };
    let term = |t: &PortTerm| match t {
        PortTerm::Constant(_) => "constant".to_string(),
        PortTerm::Network(n) => network(n, "positions"),
    };
    if let Some(d) = &m.dissipation {
        text.push_str(&format!("; damping removes energy ({})", term(d)));
    }
    if let Some((inputs, g)) = &m.input {
        text.push_str(&format!(
            "; {inputs} input(s) add or remove energy through a learned coupling ({})",
            term(g)
        ));
    }
    text
}
