//! DIR/ensemble.nc: the ensemble members and the per-component summaries, as a NetCDF classic file
//! with CF-style attributes.
//!
//! Layout (the NetCDF-3 classic data model):
//! ```text
//! dimensions:  member = UNLIMITED, component = n, name_strlen = longest name (only with names)
//! variables:   double state(member, component)       the ensemble members
//!              int    chain(member), draw(member)     where each member comes from
//!              double weight(member)                  normalised weight (weighted ensembles only)
//!              double analysis(component)             the MAP
//!              double background(component), posterior_mean(component), posterior_variance(component),
//!                     laplace_variance(component), background_variance(component)   where known
//!              char   component_name(component, name_strlen)                        where given
//! global:      title, source, history, Conventions = "CF-1.8", comment (the caution)
//! ```
//! The netcdf3 crate fixes the number of records when the header is written, so the member count is
//! taken up front and the members are streamed from an iterator, one at a time.
//!
//! Component names are stored so that every reader sees them whole: a NUL (which C readers take for the
//! end of a string) is written as the two characters `\0`, and a name longer than [`MAX_NAME_BYTES`]
//! is cut (at a character boundary) and ends in `...`, so that one huge name cannot blow the
//! (component × name_strlen) table up. Either change is stated in the variable's `comment` attribute;
//! the full names are in components.csv.

use std::cell::RefCell;
use std::fs::File;
use std::io::{BufWriter, Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};
use std::rc::Rc;

use netcdf3::{DataSet, FileWriter, Version, WriteError};

use super::summary::CAUTION;
use super::{commit, temp_sibling};
use crate::error::{Error, Result};

/// The file name inside the output folder.
pub const FILE_NAME: &str = "ensemble.nc";

/// Longest component name stored, in bytes (UTF-8); longer names are cut and end in `...`.
pub const MAX_NAME_BYTES: usize = 256;

/// The component names as stored in the file, and what had to be changed to store them.
#[derive(Debug, Clone, PartialEq)]
struct StoredNames {
    bytes: Vec<Vec<u8>>,
    escaped_nul: bool,
    cut: bool,
}

impl StoredNames {
    fn new(names: &[String]) -> Self {
        let mut stored = StoredNames {
            bytes: Vec::with_capacity(names.len()),
            escaped_nul: false,
            cut: false,
        };
        for name in names {
            let (b, escaped, cut) = stored_name(name);
            stored.escaped_nul |= escaped;
            stored.cut |= cut;
            stored.bytes.push(b);
        }
        stored
    }

    /// The longest stored name, at least 1 (a NetCDF dimension cannot be empty).
    fn strlen(&self) -> usize {
        self.bytes.iter().map(Vec::len).max().unwrap_or(0).max(1)
    }

    /// The `comment` attribute of `component_name`: what was changed, if anything.
    fn comment(&self) -> Option<String> {
        let mut notes = Vec::new();
        if self.escaped_nul {
            notes
                .push("NUL characters in names are written as the two characters \\0.".to_string());
        }
        if self.cut {
            notes.push(format!(
                "Names longer than {MAX_NAME_BYTES} bytes are cut and end in \"...\"; the full names \
                 are in components.csv."
            ));
        }
        Some(notes.join(" ")).filter(|c| !c.is_empty())
    }
}

/// One name as stored: NUL written as `\0`, cut to [`MAX_NAME_BYTES`] at a character boundary with a
/// trailing `...`; with whether a NUL was escaped and whether the name was cut.
fn stored_name(name: &str) -> (Vec<u8>, bool, bool) {
    let escaped = name.contains('\0');
    let text = if escaped {
        std::borrow::Cow::Owned(name.replace('\0', "\\0"))
    } else {
        std::borrow::Cow::Borrowed(name)
    };
    if text.len() <= MAX_NAME_BYTES {
        return (text.as_bytes().to_vec(), escaped, false);
    }
    let mut end = MAX_NAME_BYTES - 3;
    while !text.is_char_boundary(end) {
        end -= 1;
    }
    let mut b = text.as_bytes()[..end].to_vec();
    b.extend_from_slice(b"...");
    (b, escaped, true)
}

/// One ensemble member: a draw of the control vector and where it comes from.
#[derive(Debug, Clone, PartialEq)]
pub struct Member {
    /// The chain index.
    pub chain: usize,
    /// The draw index within its chain.
    pub draw: usize,
    /// The state, one value per component.
    pub state: Vec<f64>,
    /// The member's normalised weight, for a weighted ensemble ([`EnsembleInfo::weighted`]).
    pub weight: Option<f64>,
}

/// Everything in ensemble.nc except the members themselves.
#[derive(Debug, Clone, Default)]
pub struct EnsembleInfo<'a> {
    /// The `title` global attribute (e.g. "varpost posterior ensemble: lorenz96").
    pub title: &'a str,
    /// The command line of the run, for the `history` attribute.
    pub command_line: &'a str,
    /// The analysis (MAP); its length is the number of components.
    pub analysis: &'a [f64],
    /// Component names, where the problem gives them.
    pub names: Option<&'a [String]>,
    /// Units of the state components (UDUNITS syntax, e.g. "K" or "m s-1"), where known; variances get
    /// the square of them.
    pub units: Option<&'a str>,
    pub background: Option<&'a [f64]>,
    pub background_variance: Option<&'a [f64]>,
    pub posterior_mean: Option<&'a [f64]>,
    pub posterior_variance: Option<&'a [f64]>,
    pub laplace_variance: Option<&'a [f64]>,
    /// Whether the members carry weights (importance sampling): the file then has a `weight`
    /// variable, and every member must give its weight.
    pub weighted: bool,
}

/// The per-component vectors of the file: variable name, long_name, whether its units are squared.
fn component_vectors<'a>(
    info: &EnsembleInfo<'a>,
) -> Vec<(&'static str, &'static str, bool, &'a [f64])> {
    let mut v = vec![(
        "analysis",
        "analysis (maximum a posteriori state)",
        false,
        info.analysis,
    )];
    let optional = [
        ("background", "background state", false, info.background),
        (
            "background_variance",
            "background-error variance (diagonal of B)",
            true,
            info.background_variance,
        ),
        (
            "posterior_mean",
            "posterior mean estimated from the ensemble",
            false,
            info.posterior_mean,
        ),
        (
            "posterior_variance",
            "posterior variance estimated from the ensemble",
            true,
            info.posterior_variance,
        ),
        (
            "laplace_variance",
            "Laplace (Gaussian at the analysis) posterior variance: diagonal of the inverse Hessian",
            true,
            info.laplace_variance,
        ),
    ];
    for (name, long, sq, data) in optional {
        if let Some(d) = data {
            v.push((name, long, sq, d));
        }
    }
    v
}

/// Squares a UDUNITS unit string: "K" -> "K^2", "m s-1" -> "(m s-1)^2".
fn squared_units(u: &str) -> String {
    let u = u.trim();
    if u.chars().all(|c| c.is_ascii_alphabetic()) {
        format!("{u}^2")
    } else {
        format!("({u})^2")
    }
}

/// Writes DIR/ensemble.nc atomically (a temporary file, then a rename) and returns its path.
///
/// `n_members` is the number of members `members` yields; each is written as soon as it arrives, so
/// memory stays at one member. A member of the wrong length, a chain or draw index beyond the NetCDF
/// `int` range, or a member count different from `n_members` is an error and leaves no file behind.
pub fn write_ensemble<I>(
    dir: &Path,
    info: &EnsembleInfo<'_>,
    n_members: usize,
    members: I,
) -> Result<PathBuf>
where
    I: IntoIterator<Item = Result<Member>>,
{
    let path = dir.join(FILE_NAME);
    let n = info.analysis.len();
    if n == 0 {
        return Err(Error::Config(
            "cannot write an ensemble of a zero-length state".into(),
        ));
    }
    for (name, _, _, data) in component_vectors(info) {
        if data.len() != n {
            return Err(Error::Config(format!(
                "{name} has {} values but the analysis has {n} components",
                data.len()
            )));
        }
    }
    if let Some(names) = info.names {
        if names.len() != n {
            return Err(Error::Config(format!(
                "{} component names given for {n} components",
                names.len()
            )));
        }
    }
    let names = info.names.map(StoredNames::new);
    let data_set = define(info, names.as_ref(), n, n_members).map_err(|e| {
        Error::Config(format!(
            "cannot define the layout of {}: {e}",
            path.display()
        ))
    })?;

    let tmp = temp_sibling(&path)?;
    let result = write_file(&tmp, &data_set, info, names.as_ref(), n_members, members);
    match result {
        Ok(()) => commit(&tmp, &path).map(|()| path),
        Err(e) => {
            let _ = std::fs::remove_file(&tmp);
            Err(e)
        }
    }
}

/// The header: dimensions, variables and attributes.
fn define(
    info: &EnsembleInfo<'_>,
    names: Option<&StoredNames>,
    n: usize,
    n_members: usize,
) -> std::result::Result<DataSet, netcdf3::InvalidDataSet> {
    let mut ds = DataSet::new();
    ds.set_unlimited_dim("member", n_members)?;
    ds.add_fixed_dim("component", n)?;

    let title = if info.title.is_empty() {
        "varpost posterior ensemble"
    } else {
        info.title
    };
    ds.add_global_attr_string("title", title)?;
    ds.add_global_attr_string("source", format!("varpost {}", env!("CARGO_PKG_VERSION")))?;
    let when = super::utc_now();
    let history = if info.command_line.is_empty() {
        format!("{when}: written by varpost")
    } else {
        format!("{when}: {}", info.command_line)
    };
    ds.add_global_attr_string("history", history)?;
    ds.add_global_attr_string("Conventions", "CF-1.8")?;
    ds.add_global_attr_string("comment", CAUTION)?;

    let units = info.units.map(str::trim).filter(|u| !u.is_empty());
    ds.add_var_f64("state", &["member", "component"])?;
    ds.add_var_attr_string("state", "long_name", "posterior ensemble member state")?;
    if let Some(u) = units {
        ds.add_var_attr_string("state", "units", u)?;
    }
    ds.add_var_i32("chain", &["member"])?;
    ds.add_var_attr_string(
        "chain",
        "long_name",
        "index of the chain the member comes from",
    )?;
    ds.add_var_i32("draw", &["member"])?;
    ds.add_var_attr_string(
        "draw",
        "long_name",
        "index of the draw within its chain (after warm-up)",
    )?;
    if info.weighted {
        ds.add_var_f64("weight", &["member"])?;
        ds.add_var_attr_string(
            "weight",
            "long_name",
            "normalised importance weight of the member (the weights sum to 1)",
        )?;
        ds.add_var_attr_string("weight", "units", "1")?;
    }
    for (name, long, squared, _) in component_vectors(info) {
        ds.add_var_f64(name, &["component"])?;
        ds.add_var_attr_string(name, "long_name", long)?;
        if let Some(u) = units {
            let u = if squared {
                squared_units(u)
            } else {
                u.to_string()
            };
            ds.add_var_attr_string(name, "units", u)?;
        }
    }
    if let Some(names) = names {
        ds.add_fixed_dim("name_strlen", names.strlen())?;
        ds.add_var_u8("component_name", &["component", "name_strlen"])?;
        ds.add_var_attr_string("component_name", "long_name", "name of the component")?;
        if let Some(c) = names.comment() {
            ds.add_var_attr_string("component_name", "comment", c)?;
        }
    }
    Ok(ds)
}

/// A buffered file the netcdf3 writer can own while we keep a handle to flush and sync it afterwards
/// (the writer flushes nothing itself, and a buffer dropped unflushed hides write errors).
#[derive(Clone)]
struct SharedFile(Rc<RefCell<BufWriter<File>>>);

impl Write for SharedFile {
    fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
        self.0.borrow_mut().write(buf)
    }
    fn flush(&mut self) -> std::io::Result<()> {
        self.0.borrow_mut().flush()
    }
}

impl Seek for SharedFile {
    fn seek(&mut self, pos: SeekFrom) -> std::io::Result<u64> {
        self.0.borrow_mut().seek(pos)
    }
}

/// Explains a netcdf3 write error (the type implements neither Display nor Error).
fn describe(e: WriteError) -> String {
    match e {
        WriteError::IOErrorKind(k) => format!("input/output error: {k}"),
        WriteError::VariableNotDefined(v) => format!("variable {v} is not defined"),
        WriteError::VariableMismatchDataType { var_name, req, get } => {
            format!("variable {var_name} has type {req:?}, got {get:?}")
        }
        WriteError::VariableMismatchDataLength { var_name, req, get } => {
            format!("variable {var_name} takes {req} values, got {get}")
        }
        WriteError::RecordMismatchDataLength { var_name, req, get } => {
            format!("a record of {var_name} takes {req} values, got {get}")
        }
        WriteError::RecordIndexExceeded { index, num_records } => {
            format!("record {index} is beyond the {num_records} records of the file")
        }
        WriteError::ClassicVersionNotPossible => {
            "the data are too large for the classic format".into()
        }
        WriteError::HeaderAlreadyDefined => "the header was already written".into(),
        WriteError::HeaderNotDefined => "the header was not written".into(),
        WriteError::Unexpected => "unexpected failure of the NetCDF writer".into(),
    }
}

fn write_file<I>(
    tmp: &Path,
    ds: &DataSet,
    info: &EnsembleInfo<'_>,
    names: Option<&StoredNames>,
    n_members: usize,
    members: I,
) -> Result<()>
where
    I: IntoIterator<Item = Result<Member>>,
{
    let (shared, data_start) = write_header_and_fixed(tmp, ds, info, names)?;
    let mut out = shared.0.borrow_mut();
    out.seek(SeekFrom::Start(data_start))
        .map_err(|e| Error::io(tmp, e))?;
    let record_size = ds.record_size().unwrap_or(0);
    let mut record = Vec::with_capacity(record_size);
    let mut count = 0usize;
    for m in members {
        let m = m?;
        if count >= n_members {
            return Err(Error::Config(format!(
                "more ensemble members than the {n_members} announced"
            )));
        }
        encode_record(&m, count, info, &mut record)?;
        out.write_all(&record).map_err(|e| Error::io(tmp, e))?;
        count += 1;
    }
    if count != n_members {
        return Err(Error::Config(format!(
            "{count} ensemble members given, {n_members} announced"
        )));
    }
    out.flush().map_err(|e| Error::io(tmp, e))?;
    out.get_ref().sync_all().map_err(|e| Error::io(tmp, e))
}

/// Writes the header and the fixed-size variables of `ds` into `tmp` through the netcdf3 writer;
/// returns the file and where the records start.
fn write_header_and_fixed(
    tmp: &Path,
    ds: &DataSet,
    info: &EnsembleInfo<'_>,
    names: Option<&StoredNames>,
) -> Result<(SharedFile, u64)> {
    let n = info.analysis.len();
    let nc = |e: WriteError| Error::format(tmp, format!("cannot write NetCDF: {}", describe(e)));
    let file = File::create(tmp).map_err(|e| Error::io(tmp, e))?;
    let shared = SharedFile(Rc::new(RefCell::new(BufWriter::with_capacity(
        1 << 20,
        file,
    ))));
    let name = tmp.to_string_lossy().into_owned();
    let mut w = FileWriter::open_seek_write(&name, Box::new(shared.clone())).map_err(nc)?;
    // Classic (32-bit offsets) where it fits; the 64-bit-offset variant of the same data model beyond.
    match w.set_def(ds, Version::Classic, 0) {
        Ok(()) => {}
        Err(WriteError::ClassicVersionNotPossible) => {
            w = FileWriter::open_seek_write(&name, Box::new(shared.clone())).map_err(nc)?;
            w.set_def(ds, Version::Offset64Bit, 0).map_err(nc)?;
        }
        Err(e) => return Err(nc(e)),
    }
    // The header just written ends here; the data part follows.
    let header_size = shared
        .0
        .borrow_mut()
        .stream_position()
        .map_err(|e| Error::io(tmp, e))?;
    for (name, _, _, data) in component_vectors(info) {
        w.write_var_f64(name, data).map_err(nc)?;
    }
    if let Some(names) = names {
        let strlen = names.strlen();
        let mut chars = vec![0u8; n * strlen];
        for (i, s) in names.bytes.iter().enumerate() {
            chars[i * strlen..i * strlen + s.len()].copy_from_slice(s);
        }
        w.write_var_u8("component_name", &chars).map_err(nc)?;
    }
    check_record_layout(ds, n, info.weighted)?;
    // The fixed-size variables are complete; nothing is left for the writer to fill in, and its
    // closing fill would overwrite the records written afterwards.
    drop(w);
    let fixed: usize = ds
        .get_vars()
        .iter()
        .filter(|v| !v.is_record_var())
        .map(|v| v.chunk_size())
        .sum();
    Ok((shared, header_size + fixed as u64))
}

/// The records are written by [`write_file`], not by the netcdf3 writer: it keeps a set of the records
/// written per variable and merges each new record into it, which is quadratic in the member count
/// (tens of seconds for 20 000 members). The layout is the one its header announces (Unidata, "The
/// NetCDF Classic Format Specification"): after the header and the fixed-size variables, record after
/// record, each holding the record variables in definition order, each padded to 4 bytes. This checks
/// that the header announces the layout [`encode_record`] writes.
fn check_record_layout(ds: &DataSet, n: usize, weighted: bool) -> Result<()> {
    let record_vars: Vec<(&str, usize)> = ds
        .get_vars()
        .into_iter()
        .filter(|v| v.is_record_var())
        .map(|v| (v.name(), v.chunk_size()))
        .collect();
    let mut want = vec![("state", 8 * n), ("chain", 4), ("draw", 4)];
    if weighted {
        want.push(("weight", 8));
    }
    let size: usize = want.iter().map(|v| v.1).sum();
    if record_vars != want || ds.record_size() != Some(size) {
        return Err(Error::Numerical(format!(
            "unexpected NetCDF record layout {record_vars:?}; please report this"
        )));
    }
    Ok(())
}

/// One record (member number `count`) in the file's big-endian layout, into `record`.
fn encode_record(
    m: &Member,
    count: usize,
    info: &EnsembleInfo<'_>,
    record: &mut Vec<u8>,
) -> Result<()> {
    let n = info.analysis.len();
    if m.state.len() != n {
        return Err(Error::Config(format!(
            "ensemble member {count} (chain {}, draw {}) has {} components, expected {n}",
            m.chain,
            m.draw,
            m.state.len()
        )));
    }
    let index = |v: usize, what: &str| {
        i32::try_from(v).map_err(|_| {
            Error::Config(format!(
                "{what} index {v} of ensemble member {count} does not fit a NetCDF int"
            ))
        })
    };
    let (chain, draw) = (index(m.chain, "chain")?, index(m.draw, "draw")?);
    record.clear();
    for x in &m.state {
        record.extend_from_slice(&x.to_be_bytes());
    }
    record.extend_from_slice(&chain.to_be_bytes());
    record.extend_from_slice(&draw.to_be_bytes());
    match (info.weighted, m.weight) {
        (true, Some(w)) => record.extend_from_slice(&w.to_be_bytes()),
        (false, None) => {}
        (true, None) => {
            return Err(Error::Config(format!(
                "ensemble member {count} of a weighted ensemble has no weight"
            )))
        }
        (false, Some(_)) => {
            return Err(Error::Config(format!(
                "ensemble member {count} has a weight but the ensemble is not weighted"
            )))
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn names_are_stored_whole_escaped_and_cut_to_the_limit() {
        // Storage rule of this module (no outside source): NUL as \0, at most MAX_NAME_BYTES bytes.
        assert_eq!(
            stored_name("T(lev=2)"),
            (b"T(lev=2)".to_vec(), false, false)
        );
        assert_eq!(stored_name("a\0b"), (b"a\\0b".to_vec(), true, false));
        let (b, _, cut) = stored_name(&"x".repeat(5_000_000));
        assert!(cut && b.len() == MAX_NAME_BYTES && b.ends_with(b"..."));
        // A cut never splits a character: 2-byte characters up to the limit stay valid UTF-8.
        let (b, _, cut) = stored_name(&"é".repeat(MAX_NAME_BYTES));
        assert!(cut && b.len() <= MAX_NAME_BYTES);
        assert!(std::str::from_utf8(&b).unwrap().ends_with("é..."));
        let names = StoredNames::new(&["a\0".to_string(), "b".repeat(300)]);
        assert_eq!(names.strlen(), MAX_NAME_BYTES);
        let c = names.comment().unwrap();
        assert!(c.contains("\\0") && c.contains("components.csv"), "{c}");
        assert_eq!(StoredNames::new(&["a".into()]).comment(), None);
    }

    #[test]
    fn squared_units_keep_udunits_syntax() {
        // UDUNITS-2 grammar: a power of a product is written with parentheses (common practice, no
        // source).
        assert_eq!(squared_units("K"), "K^2");
        assert_eq!(squared_units("m s-1"), "(m s-1)^2");
    }
}
