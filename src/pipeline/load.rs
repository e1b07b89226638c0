//! Opening the problem a run works on, and reading start points.

use std::path::Path;

use crate::adapter::AdapterProblem;
use crate::config::ProblemSource;
use crate::error::{Error, Result};
use crate::output::summary::ReferenceSummary;
use crate::output::Summary;
use crate::problem::builtin::{self, Builtin};
use crate::problem::replay::Replay;
use crate::problem::settings::Settings;
use crate::problem::{Counted, Problem};

/// A problem ready to run: counted, with what the tool knows about it.
pub struct Loaded {
    /// The problem, counting every evaluation.
    pub problem: Counted<Replay<Box<dyn Problem>>>,
    pub name: String,
    pub description: String,
    pub settings: serde_json::Value,
    pub reference: Option<ReferenceSummary>,
    pub truth: Option<Vec<f64>>,
}

impl Loaded {
    /// A problem of your own, implemented in Rust, ready for the pipeline; `name` identifies it in
    /// outputs and checkpoints. Its run records say [`ProblemSource::InProcess`].
    pub fn from_problem(name: &str, problem: Box<dyn Problem>) -> Loaded {
        Loaded {
            problem: Counted::new(Replay::new(problem)),
            name: name.to_string(),
            description: format!("{name} (in-process)"),
            settings: serde_json::Value::Null,
            reference: None,
            truth: None,
        }
    }

    /// Component names: the problem's own, or x0, x1, ….
    pub fn names(&self) -> Vec<String> {
        self.problem
            .component_names()
            .filter(|v| v.len() == self.problem.dim())
            .unwrap_or_else(|| (0..self.problem.dim()).map(|i| format!("x{i}")).collect())
    }

    /// A summary carrying the problem's identity, its prior and its reference.
    pub fn summary(&self, command: &str) -> Summary {
        let mut s = Summary::new(
            command,
            &self.name,
            &self.description,
            self.problem.dim(),
            self.settings.clone(),
        );
        s.reference = self.reference.clone();
        s.component_names = Some(self.names());
        if let Some(p) = self.problem.prior() {
            s.background = Some(p.mean().to_vec());
            s.background_variance = Some(p.variance());
        }
        s
    }

    /// The start of the gradient test and of the minimisation: the file given, else the background.
    pub fn start(&self, file: Option<&Path>) -> Result<Vec<f64>> {
        match file {
            Some(p) => read_vector(p, self.problem.dim()),
            None => self.problem.prior().map(|p| p.mean().to_vec()).ok_or_else(|| {
                Error::Config(
                    "the problem does not give its background state; pass a start point with --start FILE"
                        .into(),
                )
            }),
        }
    }
}

/// Opens the problem a run works on.
pub fn load(source: &ProblemSource) -> Result<Loaded> {
    match source {
        ProblemSource::Builtin { name, settings } => {
            let s = Settings::parse(settings)?;
            let Builtin {
                problem,
                description,
                settings,
                reference,
                truth,
            } = builtin::open(name, &s)?;
            Ok(Loaded {
                problem: Counted::new(Replay::new(problem)),
                name: name.clone(),
                description,
                settings,
                reference: reference.map(|r| ReferenceSummary {
                    mean: r.mean,
                    variance: r.variance,
                }),
                truth,
            })
        }
        ProblemSource::InProcess { name } => Err(Error::Config(format!(
            "the run used the in-process problem '{name}', which cannot be reopened from its record: \
             hand it to the pipeline again with Loaded::from_problem"
        ))),
        ProblemSource::Adapter(config) => {
            let p = AdapterProblem::start(config)?;
            let description = match p.label() {
                Some(l) => format!("{l} (adapter `{}`)", config.command),
                None => format!("adapter `{}`", config.command),
            };
            let settings = serde_json::json!({
                "adapter": config.command,
                "launcher": config.launcher,
                "workers": config.workers,
                "encoding": p.encoding().name(),
            });
            Ok(Loaded {
                problem: Counted::new(Replay::new(Box::new(p) as Box<dyn Problem>)),
                name: "adapter".into(),
                description,
                settings,
                reference: None,
                truth: None,
            })
        }
    }
}

/// Largest start file read: room for 10⁷ values written in full precision.
const MAX_START_BYTES: u64 = 512 << 20;

/// Reads a start point: numbers separated by commas, spaces or newlines (lines starting with # are
/// comments), or a two-column CSV `component,value` with that header. The file is read with a size
/// bound, so that a device such as /dev/zero is refused instead of read forever.
pub fn read_vector(path: &Path, dim: usize) -> Result<Vec<f64>> {
    let text = crate::resources::read_bounded(path, MAX_START_BYTES)?;
    let mut lines: Vec<&str> = text
        .lines()
        .filter(|l| !l.trim().is_empty() && !l.trim_start().starts_with('#'))
        .collect();
    let two_col = lines
        .first()
        .is_some_and(|l| l.trim().starts_with("component"));
    if two_col {
        lines.remove(0);
    }
    let mut v = Vec::new();
    for (i, l) in lines.iter().enumerate() {
        let fields: Vec<&str> = l
            .split(|c: char| c == ',' || c.is_whitespace())
            .filter(|f| !f.is_empty())
            .collect();
        let fields = if two_col {
            fields.last().into_iter().copied().collect()
        } else {
            fields
        };
        for f in fields {
            let x: f64 = f.parse().map_err(|_| {
                Error::format(path, format!("line {}: '{f}' is not a number", i + 1))
            })?;
            if !x.is_finite() {
                return Err(Error::format(
                    path,
                    format!("line {}: value {x} is not finite", i + 1),
                ));
            }
            v.push(x);
        }
    }
    if v.len() != dim {
        return Err(Error::format(
            path,
            format!("{} values, but the problem has dimension {dim}", v.len()),
        ));
    }
    Ok(v)
}
