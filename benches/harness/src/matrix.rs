//! The configurations the benchmark runs.

use varpost::problem::builtin;

use crate::run::Spec;

/// Label of the linear-Gaussian case (the targets look it up).
pub const LG: &str = "linear-gaussian";
/// Labels of the Lorenz-96 cases.
pub const L96_LINEAR: &str = "lorenz96 linear";
pub const L96_SQUARE: &str = "lorenz96 square";
/// Label of the Burgers case.
pub const BURGERS: &str = "burgers";

/// The runs, and notes on what was left out.
pub struct Plan {
    pub specs: Vec<Spec>,
    pub notes: Vec<String>,
}

/// Linear-Gaussian settings: n = 1000 (100 in quick mode), 100 observations through a rank-100
/// forward map, background variances spread over four decades (b_cond = 1e4).
pub fn lg_settings(quick: bool) -> Vec<(String, String)> {
    let (n, m) = if quick {
        ("100", "20")
    } else {
        ("1000", "100")
    };
    pairs(&[("n", n), ("m", m), ("b_cond", "1e4")])
}

fn pairs(p: &[(&str, &str)]) -> Vec<(String, String)> {
    p.iter()
        .map(|(k, v)| (k.to_string(), v.to_string()))
        .collect()
}

/// Whether the built-in problem list has `name`.
fn has_builtin(name: &str) -> bool {
    builtin::NAMES.contains(&name)
}

pub fn plan(quick: bool) -> Plan {
    let (warmup, draws) = if quick { (100, 100) } else { (1000, 1000) };
    let mut specs = Vec::new();
    let mut notes = Vec::new();
    let mut add =
        |case: &str, problem: &str, settings: &[(String, String)], runs: &[(&str, &str)]| {
            for (sampler, precond) in runs {
                specs.push(Spec {
                    case: case.to_string(),
                    problem: problem.to_string(),
                    settings: settings.to_vec(),
                    sampler: sampler.to_string(),
                    precond: precond.to_string(),
                    warmup,
                    draws,
                    seed: 1,
                });
            }
        };
    let square = pairs(&[("obs_op", "square")]);
    if quick {
        add(
            LG,
            "linear-gaussian",
            &lg_settings(true),
            &[("laplace-mh", "low-rank"), ("nuts-diag", "-")],
        );
        add(
            L96_LINEAR,
            "lorenz96",
            &[],
            &[("hmc", "dense"), ("nuts-diag", "-")],
        );
        add(
            L96_SQUARE,
            "lorenz96",
            &square,
            &[("hmc", "low-rank"), ("nuts-lowrank", "-")],
        );
        notes.push(
            "Quick mode: 100 warm-up iterations and 100 draws per chain, linear-Gaussian at n = 100, \
             one or two configurations per problem. The figures check that the harness runs; they are \
             not the benchmark."
                .to_string(),
        );
    } else {
        // n = 1000: the dense Hessian (n products) is left out, as the tool's own automatic choice
        // does above n = 400.
        let lg: &[(&str, &str)] = &[
            ("mala", "identity"),
            ("mala", "diagonal"),
            ("mala", "lbfgs"),
            ("mala", "low-rank"),
            ("hmc", "identity"),
            ("hmc", "diagonal"),
            ("hmc", "lbfgs"),
            ("hmc", "low-rank"),
            ("laplace-mh", "diagonal"),
            ("laplace-mh", "lbfgs"),
            ("laplace-mh", "low-rank"),
            ("nuts-diag", "-"),
            ("nuts-lowrank", "-"),
        ];
        add(LG, "linear-gaussian", &lg_settings(false), lg);
        let l96: &[(&str, &str)] = &[
            ("mala", "identity"),
            ("mala", "diagonal"),
            ("mala", "lbfgs"),
            ("mala", "dense"),
            ("mala", "low-rank"),
            ("hmc", "identity"),
            ("hmc", "diagonal"),
            ("hmc", "lbfgs"),
            ("hmc", "dense"),
            ("hmc", "low-rank"),
            ("laplace-mh", "diagonal"),
            ("laplace-mh", "lbfgs"),
            ("laplace-mh", "dense"),
            ("laplace-mh", "low-rank"),
            ("nuts-diag", "-"),
            ("nuts-lowrank", "-"),
        ];
        add(L96_LINEAR, "lorenz96", &[], l96);
        add(L96_SQUARE, "lorenz96", &square, l96);
        notes.push(
            "Laplace-MH (an independence sampler whose proposal is the preconditioner's Gaussian) is \
             not run with the identity preconditioner, which is no approximation of the posterior."
                .to_string(),
        );
    }
    if has_builtin("burgers") {
        let runs: &[(&str, &str)] = if quick {
            &[("mala", "low-rank")]
        } else {
            &[
                ("mala", "low-rank"),
                ("hmc", "low-rank"),
                ("nuts-diag", "-"),
            ]
        };
        add(BURGERS, "burgers", &[], runs);
    } else {
        notes.push(
            "burgers: not among this build's built-in problems, so not run (its target is not judged)."
                .to_string(),
        );
    }
    Plan { specs, notes }
}
