//! Data input and output: sensor recordings as CSV or `NumPy` `.npy`.
//!
//! The file type comes from the extension (case-insensitive):
//!
//! - **`.csv`**: a header row, then one row per time step. Every column is a
//!   numeric feature (any name), except an optional column named `label`
//!   (any case), which holds `0` or `1` per row and is carried separately,
//!   never as a feature. Cells may have surrounding whitespace. Feature
//!   values are parsed as `f32` (correctly rounded); empty cells,
//!   non-numbers, `NaN`/`inf`, values outside the `f32` range, labels other
//!   than 0 or 1 (`1.0` is accepted), rows with a different number of fields
//!   than the header, empty or duplicate column names are errors. Errors name
//!   the file, the 1-based line and the column (1-based index and header
//!   name), for example `data.csv: line 17, column 3 ("vib_z"): "abc" is not
//!   a number`.
//! - **`.npy`**: one array of shape `[T, X]` (T steps, X features) or `[T]`
//!   (one feature), dtype `float32` or `float64` in either byte order, C order
//!   (Fortran order is refused unless it is the same layout, i.e. one row or
//!   one column). `float64` values are rounded to the nearest `f32`. Columns
//!   are named `x0, x1, ...`; there are no labels. Non-finite values are
//!   errors naming the file and the element as numpy indexes it (`[row,
//!   column]`, 0-based).
//!
//! A file with no data rows or no feature columns is an error.
//!
//! [`for_each_row`] streams a file row by row (with an optional progress bar
//! on stderr); [`read`] loads it whole into a [`Dataset`]; [`write_csv`]
//! writes a CSV atomically.

use anyhow::{anyhow, bail, Context, Result};
use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};
use std::cell::Cell;
use std::fmt::Write as _;
use std::fs::File;
use std::io::{self, BufReader, Read, Seek, SeekFrom};
use std::path::{Path, PathBuf};
use std::rc::Rc;

/// Files larger than this many bytes get a progress bar when one is asked for.
const PROGRESS_MIN_BYTES: u64 = 1 << 20;

/// The progress bar is redrawn at most once per this many bytes read.
const PROGRESS_STEP_BYTES: u64 = 64 << 10;

/// What the accepted input kinds are, for error messages.
const ACCEPTED: &str = "accepted: .csv (header row, numeric columns, optional `label` column) \
                        or .npy (float32/float64, shape [T] or [T, X])";

/// A whole data file in memory.
#[derive(Clone, Debug, PartialEq)]
pub struct Dataset {
    /// The file it was read from, as given.
    pub path: PathBuf,
    /// Feature column names, in file order (CSV header names without the
    /// label column; `x0, x1, ...` for `.npy`).
    pub columns: Vec<String>,
    /// One row per time step, each with `columns.len()` finite values.
    pub rows: Vec<Vec<f32>>,
    /// Per-row labels (0 or 1) if the file had a `label` column, else `None`.
    pub labels: Option<Vec<u8>>,
}

impl Dataset {
    /// Number of feature columns (the label column is not one).
    #[must_use]
    pub fn features(&self) -> usize {
        self.columns.len()
    }

    /// Number of rows (time steps).
    #[must_use]
    pub fn len(&self) -> usize {
        self.rows.len()
    }

    /// Returns true if and only if there are no rows ([`read`] never returns
    /// such a data set).
    #[must_use]
    pub fn is_empty(&self) -> bool {
        self.rows.is_empty()
    }

    /// Checks that the data has as many feature columns as the model has
    /// inputs.
    ///
    /// # Errors
    /// If `features() != expected`, with a message such as `data.csv has 3
    /// feature columns (a, b, c) but the model takes 4 inputs` (long column
    /// lists are shortened).
    pub fn expect_features(&self, expected: usize) -> Result<()> {
        const SHOWN: usize = 12;
        let n = self.features();
        if n == expected {
            return Ok(());
        }
        let mut list = self.columns.iter().take(SHOWN).map(String::as_str).collect::<Vec<_>>().join(", ");
        if n > SHOWN {
            let _ = write!(list, ", ... ({} more)", n - SHOWN);
        }
        bail!(
            "{} has {} ({}) but the model takes {}",
            self.path.display(),
            count(n, "feature column", "feature columns"),
            list,
            count(expected, "input", "inputs")
        )
    }
}

/// `1 input`, `2 inputs`.
fn count(n: usize, one: &str, many: &str) -> String {
    format!("{n} {}", if n == 1 { one } else { many })
}

/// Streams the rows of a `.csv` or `.npy` file (see the [module
/// docs](self)) without holding the whole file in memory.
///
/// Calls `f(row_index, row, label)` once per row, in order: `row_index`
/// counts data rows from 0 (the CSV header is not a row), `row` holds one
/// finite value per feature column, `label` is `Some(0 or 1)` when the CSV
/// has a `label` column and `None` otherwise. Returns the feature column
/// names.
///
/// When `progress` is true and the file is larger than 1 MiB, a progress bar
/// (bytes read of the file size) is drawn on stderr; it stays hidden when
/// stderr is not a terminal, and is cleared when reading ends.
///
/// # Errors
/// An unsupported extension, a file that cannot be opened, any format error
/// listed in the module docs (naming file, line or row, and column), or an
/// error returned by `f`, which gets the file and line (or row) as context.
/// Rows before the failing one have already been passed to `f`.
pub fn for_each_row(
    path: &Path,
    progress: bool,
    f: impl FnMut(usize, &[f32], Option<u8>) -> Result<()>,
) -> Result<Vec<String>> {
    match Kind::of(path)? {
        Kind::Csv => csv_rows(path, progress, f),
        Kind::Npy => npy_rows(path, progress, f),
    }
}

/// Reads a whole `.csv` or `.npy` file (see the [module docs](self)) into
/// memory, through [`for_each_row`].
///
/// # Errors
/// As [`for_each_row`].
pub fn read(path: &Path, progress: bool) -> Result<Dataset> {
    let mut rows = Vec::new();
    let mut labels = Vec::new();
    let columns = for_each_row(path, progress, |_, row, label| {
        rows.push(row.to_vec());
        if let Some(l) = label {
            labels.push(l);
        }
        Ok(())
    })?;
    // The CSV reader gives a label for every row or for none.
    let labels = (!labels.is_empty()).then_some(labels);
    Ok(Dataset { path: path.to_path_buf(), columns, rows, labels })
}

/// Writes a CSV file with the given header and rows, atomically.
///
/// Values are written with Rust's `{}` formatting of `f32` (the shortest
/// text that reads back to the same `f32`, never in exponent form);
/// non-finite values are written as `NaN`, `inf`, `-inf`, which [`read`]
/// refuses. Names containing commas or quotes are quoted. To write labels
/// that [`read`] picks up, name a column `label` and give it 0.0 or 1.0.
///
/// The data goes to a temporary file in the destination's directory, which
/// is renamed over `path` only once everything is written and synced, so
/// `path` either keeps its old content or gets the whole new one; no partial
/// file is left behind on error. On Unix the new file gets the usual
/// permissions (`0o666` minus the umask).
///
/// # Errors
/// An empty header, a row whose length differs from the header's, a
/// destination directory that does not exist (named in the message), or an
/// I/O error while writing or renaming.
pub fn write_csv(path: &Path, header: &[String], rows: impl IntoIterator<Item = impl AsRef<[f32]>>) -> Result<()> {
    write_csv_streaming(path, header, |sink| {
        for row in rows {
            sink.push(row.as_ref())?;
        }
        Ok(())
    })
    .map(|_| ())
}

/// Receives rows for [`write_csv_streaming`].
pub struct CsvSink<'a> {
    w: io::BufWriter<&'a File>,
    name: String,
    cols: usize,
    rows: usize,
    /// The row being written, reused for every row.
    line: Vec<u8>,
}

impl CsvSink<'_> {
    /// Writes one row.
    ///
    /// # Errors
    /// A row whose length differs from the header's, or an I/O error.
    pub fn push(&mut self, row: &[f32]) -> Result<()> {
        use std::io::Write as _;
        let name = &self.name;
        if row.len() != self.cols {
            bail!(
                "cannot write {name}: row {} has {} but the header has {}",
                self.rows,
                count(row.len(), "value", "values"),
                count(self.cols, "column", "columns")
            );
        }
        // The text of `{}` for `f32` is digits, `.`, `-`, `NaN` or `inf`:
        // nothing a CSV writer quotes, so the row is written as is, with the
        // CSV writer's `,` delimiter and `\n` terminator.
        self.line.clear();
        for (i, v) in row.iter().enumerate() {
            if i > 0 {
                self.line.push(b',');
            }
            push_f32(&mut self.line, *v);
        }
        self.line.push(b'\n');
        self.w.write_all(&self.line).with_context(|| format!("cannot write {name}"))?;
        self.rows += 1;
        Ok(())
    }
}

/// Appends the text Rust's `{}` formatting of `f32` writes for `v`, faster.
///
/// `{}` writes the shortest decimal that reads back to the same `f32` (the
/// closest such one, the larger at an exact tie), laid out without an
/// exponent: `-0`, `123`, `0.00123`, `1000000000000000000000` (`1e21`).
/// `ryu` finds the same digits, except at an exact tie, where it takes the
/// even last digit (`2^-12 = 0.000244140625`: `{}` writes `0.00024414063`,
/// ryu `0.00024414062`), and lays them out its own way (`123.0`,
/// `1.23e-7`, `1e21`). This function turns ryu's layout into `{}`'s and
/// leaves ties, non-finite values and any text it does not expect to `{}`
/// itself. Checked against `{}` for every one of the 2^32 bit patterns by
/// the ignored test `push_f32_matches_display_for_every_f32`.
fn push_f32(out: &mut Vec<u8>, v: f32) {
    use std::io::Write as _;
    let mut buf = ryu::Buffer::new();
    if !(v.is_finite() && push_ryu_as_display(out, v, buf.format_finite(v).as_bytes())) {
        // Writing into a `Vec<u8>` cannot fail.
        let _ = write!(out, "{v}");
    }
}

/// Writes ryu's text `text` of the finite `v` in the layout of `{}` (see
/// [`push_f32`]); returns false, having written nothing, at a tie or for
/// text it does not expect.
fn push_ryu_as_display(out: &mut Vec<u8>, v: f32, text: &[u8]) -> bool {
    let (sign, body) = match text.split_first() {
        Some((b'-', rest)) => (&b"-"[..], rest),
        _ => (&b""[..], text),
    };
    let mut parts = body.splitn(2, |b| *b == b'e');
    let mant = parts.next().unwrap_or_default();
    let exp = match parts.next().map(|e| std::str::from_utf8(e).ok().and_then(|e| e.parse::<i32>().ok())) {
        None => 0,
        Some(Some(e)) => e,
        Some(None) => return false,
    };
    if mant.is_empty() || !mant.iter().all(|b| b.is_ascii_digit() || *b == b'.') {
        return false;
    }
    // Places after the decimal point of the last digit ryu wrote.
    let frac = mant.iter().position(|b| *b == b'.').map_or(0, |p| mant.len() - p - 1);
    let places = i32::try_from(frac).unwrap_or(i32::MAX) - exp;
    // A tie: `v` itself has exactly one decimal place more than those
    // digits (its last one a 5), so two candidates are equally close.
    if odd_exponent(v).is_some_and(|e| -e == places.saturating_add(1)) {
        return false;
    }
    let digits = mant.iter().copied().filter(|b| *b != b'.');
    let zeros = |n: i32| std::iter::repeat_n(b'0', usize::try_from(n).unwrap_or(0));
    out.extend_from_slice(sign);
    if exp == 0 {
        // `123.0`, `1.25`, `0.00125`: `{}` drops the `.0` of whole numbers.
        out.extend_from_slice(mant.strip_suffix(b".0").unwrap_or(mant));
    } else if exp > 0 {
        // `1.5e20` (ryu writes exponents from 1e13 up; an f32 has at most 9
        // digits): the digits, then zeros up to the units.
        let n = i32::try_from(digits.clone().count()).unwrap_or(0);
        out.extend(digits);
        out.extend(zeros(exp + 1 - n));
    } else {
        // `1.5e-7`: `0.`, the zeros after the point, the digits.
        out.extend_from_slice(b"0.");
        out.extend(zeros(-exp - 1));
        out.extend(digits);
    }
    true
}

/// The exponent `e` of `v = m * 2^e` with `m` odd (`None` for zero and
/// non-finite values): `v` has `-e` decimal places when `e < 0`.
fn odd_exponent(v: f32) -> Option<i32> {
    if !v.is_finite() {
        return None;
    }
    let bits = v.to_bits();
    let (field, fraction) = ((bits >> 23) & 0xff, bits & 0x7f_ffff);
    let (m, e) = if field == 0 { (fraction, -149) } else { (fraction | 1 << 23, i32::try_from(field).ok()? - 150) };
    (m != 0).then(|| e + i32::try_from(m.trailing_zeros()).unwrap_or(0))
}

/// As [`write_csv`], but rows are produced by `produce` one at a time (so
/// a long run never holds its output in memory). Returns the rows written.
/// If `produce` fails, nothing is written.
///
/// # Errors
/// As [`write_csv`], and any error from `produce`.
pub fn write_csv_streaming(
    path: &Path,
    header: &[String],
    produce: impl FnOnce(&mut CsvSink<'_>) -> Result<()>,
) -> Result<usize> {
    use std::io::Write as _;
    let name = path.display().to_string();
    if header.is_empty() {
        bail!("cannot write {name}: no columns to write");
    }
    // The header goes through the CSV writer, which quotes names that need it.
    let mut head = csv::Writer::from_writer(Vec::new());
    head.write_record(header).with_context(|| format!("cannot write {name}"))?;
    let head = head.into_inner().map_err(|e| anyhow!("cannot write {name}: {}", e.error()))?;
    let mut written = 0;
    crate::output::write_atomic_with(path, |file| {
        let mut w = io::BufWriter::with_capacity(WRITE_BUFFER_BYTES, file);
        w.write_all(&head).with_context(|| format!("cannot write {name}"))?;
        let mut sink = CsvSink { w, name: name.clone(), cols: header.len(), rows: 0, line: Vec::new() };
        produce(&mut sink)?;
        sink.w.flush().with_context(|| format!("cannot write {name}"))?;
        written = sink.rows;
        Ok(())
    })?;
    Ok(written)
}

/// Write buffer of CSV outputs, in bytes.
const WRITE_BUFFER_BYTES: usize = 1 << 18;

/// Read buffer of the CSV reader, in bytes (the reader's default is 8 KiB).
const READ_BUFFER_BYTES: usize = 1 << 16;

/// Most feature columns a data file may have.
const MAX_COLUMNS: usize = 1 << 16;

/// The input kinds, chosen by extension.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Kind {
    Csv,
    Npy,
}

impl Kind {
    fn of(path: &Path) -> Result<Kind> {
        let ext = path.extension().and_then(|e| e.to_str()).map(str::to_ascii_lowercase);
        match ext.as_deref() {
            Some("csv") => Ok(Kind::Csv),
            Some("npy") => Ok(Kind::Npy),
            Some(other) => bail!("{}: unsupported file type .{other} ({ACCEPTED})", path.display()),
            None => bail!("{}: unsupported file type (no extension; {ACCEPTED})", path.display()),
        }
    }
}

/// A progress bar over the bytes of one file, cleared when dropped (so an
/// error does not leave a stale bar behind).
struct Progress {
    bar: Option<ProgressBar>,
    shown: u64,
}

impl Progress {
    fn new(path: &Path, enabled: bool, file_len: Option<u64>) -> Progress {
        let bar = match file_len {
            Some(len) if enabled && len > PROGRESS_MIN_BYTES => {
                let style = ProgressStyle::with_template("{msg} [{wide_bar}] {bytes}/{total_bytes} ({eta})")
                    .unwrap_or_else(|_| ProgressStyle::default_bar());
                let bar = ProgressBar::with_draw_target(Some(len), ProgressDrawTarget::stderr()).with_style(style);
                bar.set_message(
                    path.file_name().map_or_else(|| path.display().to_string(), |n| n.to_string_lossy().into_owned()),
                );
                Some(bar)
            }
            _ => None,
        };
        Progress { bar, shown: 0 }
    }

    fn update(&mut self, bytes_read: u64) {
        if let Some(bar) = &self.bar {
            if bytes_read.saturating_sub(self.shown) >= PROGRESS_STEP_BYTES {
                bar.set_position(bytes_read);
                self.shown = bytes_read;
            }
        }
    }
}

impl Drop for Progress {
    fn drop(&mut self) {
        if let Some(bar) = &self.bar {
            bar.finish_and_clear();
        }
    }
}

fn open(path: &Path) -> Result<(File, Option<u64>)> {
    let file = File::open(path).with_context(|| format!("cannot open {}", path.display()))?;
    let len = file.metadata().ok().map(|m| m.len());
    Ok((file, len))
}

/// Shows a cell in an error message: quoted, escaped and shortened.
fn show(cell: &str) -> String {
    const MAX: usize = 40;
    if cell.chars().count() <= MAX {
        format!("{cell:?}")
    } else {
        let head: String = cell.chars().take(MAX).collect();
        format!("{head:?}...")
    }
}

// ---------------------------------------------------------------- CSV

fn csv_rows(
    path: &Path,
    progress: bool,
    mut f: impl FnMut(usize, &[f32], Option<u8>) -> Result<()>,
) -> Result<Vec<String>> {
    let name = path.display();
    let (file, file_len) = open(path)?;
    let mut rdr = csv::ReaderBuilder::new()
        .has_headers(true)
        // The header is trimmed by the reader; data cells are trimmed below
        // in place (the reader's field trimming builds a new record per row).
        .trim(csv::Trim::Headers)
        // Ragged rows are checked below, with a message naming the column.
        .flexible(true)
        .buffer_capacity(READ_BUFFER_BYTES)
        .from_reader(file);
    let header = rdr.headers().map_err(|e| csv_error(path, None, e))?.clone();
    let header_line = header.position().map_or(1, csv::Position::line);
    if header.is_empty() {
        bail!("{name} has no data rows (the file is empty)");
    }

    let mut label_col: Option<usize> = None;
    let mut columns = Vec::with_capacity(header.len());
    for (i, h) in header.iter().enumerate() {
        let at = format!("{name}: line {header_line}, column {} ({})", i + 1, show(h));
        if h.is_empty() {
            bail!(
                "{at}: the column has no name (a pandas index column? save with `index=False`, \
                 or give every column a name)"
            );
        }
        if let Some(j) = header.iter().take(i).position(|other| other == h) {
            bail!("{at}: column {} has the same name", j + 1);
        }
        if h.eq_ignore_ascii_case("label") {
            if let Some(j) = label_col {
                bail!("{at}: a second label column (column {} is one already)", j + 1);
            }
            label_col = Some(i);
        } else {
            columns.push(h.to_string());
        }
    }
    if columns.is_empty() {
        bail!("{name} has no feature columns (only a label column)");
    }

    let mut progress = Progress::new(path, progress, file_len);
    // One record and one row reused for every row: no allocation per row.
    // Cells are checked as UTF-8 (the whole record first, as the reader's
    // `StringRecord` does) and trimmed of Unicode whitespace (as its
    // `Trim::All` does).
    let mut record = csv::ByteRecord::new();
    let mut row: Vec<f32> = Vec::with_capacity(columns.len());
    let mut index = 0usize;
    loop {
        // A UTF-8 error names the line where the reader stood before the
        // record, as the CSV reader's own error does.
        let before = rdr.position().line();
        let more = rdr.read_byte_record(&mut record).map_err(|e| csv_error(path, Some(&header), e))?;
        if !more {
            break;
        }
        let not_utf8 = |i: usize| {
            let title = header.get(i).map_or_else(String::new, |h| format!(" ({})", show(h)));
            anyhow!("{name}: line {before}, column {}{title}: not valid UTF-8 text (save the file as UTF-8)", i + 1)
        };
        if !record.as_slice().is_ascii() {
            if let Some(i) = record.iter().position(|field| std::str::from_utf8(field).is_err()) {
                return Err(not_utf8(i));
            }
        }
        let (line, byte) = record.position().map_or((0, 0), |p| (p.line(), p.byte()));
        if record.len() != header.len() {
            let fields = count(record.len(), "field", "fields");
            let cols = count(header.len(), "column", "columns");
            if record.len() < header.len() {
                let missing = record.len();
                let h = header.get(missing).unwrap_or("");
                bail!(
                    "{name}: line {line}, column {} ({}): missing (the row has {fields} but the header has {cols})",
                    missing + 1,
                    show(h)
                );
            }
            let extra = header.len();
            bail!(
                "{name}: line {line}, column {} (beyond the header): extra field {} (the row has {fields} but \
                 the header has {cols})",
                extra + 1,
                show(record.get(extra).and_then(|f| std::str::from_utf8(f).ok()).map_or("", str::trim))
            );
        }

        row.clear();
        let mut label = None;
        for (i, (field, h)) in record.iter().zip(header.iter()).enumerate() {
            let at = || format!("{name}: line {line}, column {} ({})", i + 1, show(h));
            let cell = std::str::from_utf8(field).map_err(|_| not_utf8(i))?.trim();
            if Some(i) == label_col {
                label = Some(parse_label(cell).map_err(|why| anyhow!("{}: {why}", at()))?);
            } else {
                row.push(parse_value(cell).map_err(|why| anyhow!("{}: {why}", at()))?);
            }
        }
        f(index, &row, label).with_context(|| format!("{name}: line {line}"))?;
        index += 1;
        progress.update(byte);
    }
    if index == 0 {
        bail!("{name} has no data rows (only a header)");
    }
    Ok(columns)
}

/// Turns a reader error into a message naming file, line and column where
/// the CSV reader knows them (invalid UTF-8); `header` is `None` while the
/// header itself is being read.
fn csv_error(path: &Path, header: Option<&csv::StringRecord>, e: csv::Error) -> anyhow::Error {
    let name = path.display();
    match e.kind() {
        csv::ErrorKind::Utf8 { pos: Some(pos), err } => {
            let col = err.field();
            let title = header.and_then(|h| h.get(col)).map_or_else(String::new, |h| format!(" ({})", show(h)));
            anyhow!(
                "{name}: line {}, column {}{title}: not valid UTF-8 text (save the file as UTF-8)",
                pos.line(),
                col + 1
            )
        }
        csv::ErrorKind::Io(_) => anyhow::Error::new(e).context(format!("{name}: cannot read")),
        _ => anyhow::Error::new(e).context(format!("{name}: malformed CSV")),
    }
}

/// Parses one feature cell (already trimmed) to a finite `f32`.
fn parse_value(cell: &str) -> std::result::Result<f32, String> {
    if cell.is_empty() {
        return Err("empty cell".to_string());
    }
    match cell.parse::<f32>() {
        Ok(v) if v.is_finite() => Ok(v),
        // `1e39` parses to infinity as f32 but is a finite number.
        Ok(_) if cell.parse::<f64>().is_ok_and(f64::is_finite) => {
            Err(format!("{} is outside the f32 range", show(cell)))
        }
        Ok(_) => Err(format!("{} is not a finite number", show(cell))),
        Err(_) => Err(format!("{} is not a number", show(cell))),
    }
}

/// Parses one label cell (already trimmed): 0 or 1, also written as `0.0`.
fn parse_label(cell: &str) -> std::result::Result<u8, String> {
    if cell.is_empty() {
        return Err("empty cell (labels must be 0 or 1)".to_string());
    }
    match cell.parse::<f64>() {
        Ok(0.0) => Ok(0),
        Ok(1.0) => Ok(1),
        _ => Err(format!("{} is not a valid label (expected 0 or 1)", show(cell))),
    }
}

// ---------------------------------------------------------------- .npy

/// Counts the bytes handed to the `.npy` parser: after the header this is
/// the header's length, later the progress position.
struct CountingReader<R> {
    inner: R,
    count: Rc<Cell<u64>>,
}

impl<R: Read> Read for CountingReader<R> {
    fn read(&mut self, buf: &mut [u8]) -> io::Result<usize> {
        let n = self.inner.read(buf)?;
        self.count.set(self.count.get().saturating_add(n as u64));
        Ok(n)
    }
}

/// Shape of the array in a `.npy` file, as rows of features.
#[derive(Clone, Copy)]
struct NpyShape {
    rows: usize,
    cols: usize,
    one_dim: bool,
}

impl NpyShape {
    /// The element as numpy indexes it: `[r, c]`, or `[r]` for a 1-D array.
    fn at(self, r: usize, c: usize) -> String {
        if self.one_dim {
            format!("[{r}]")
        } else {
            format!("[{r}, {c}]")
        }
    }
}

/// Longest `.npy` header accepted, in bytes (numpy writes well under 1 KiB
/// for a 2-D array and refuses headers over 10,000 bytes by default).
const MAX_NPY_HEADER_BYTES: u64 = 1 << 16;

/// Checks the `.npy` preamble (magic, version, header length) before `npyz`
/// reads the header, so a file claiming a header of gigabytes is refused
/// without allocating it; leaves `file` at its start.
fn check_npy_preamble(path: &Path, file: &mut File, file_len: Option<u64>) -> Result<()> {
    let name = path.display();
    let mut pre = Vec::with_capacity(12);
    file.by_ref().take(12).read_to_end(&mut pre).with_context(|| format!("{name}: cannot read"))?;
    file.seek(SeekFrom::Start(0)).with_context(|| format!("{name}: cannot read"))?;
    if pre.is_empty() {
        bail!("{name}: not a valid .npy file: the file is empty");
    }
    if !pre.starts_with(b"\x93NUMPY") {
        bail!("{name}: not a valid .npy file: it does not start with the .npy magic \\x93NUMPY");
    }
    let field = |range: std::ops::Range<usize>| {
        pre.get(range).map(|b| b.iter().rev().fold(0u64, |a, &x| a << 8 | u64::from(x)))
    };
    let (header_len, preamble) = match pre.get(6).copied() {
        Some(1) => (field(8..10), 10u64),
        Some(2 | 3) => (field(8..12), 12u64),
        Some(v) => bail!("{name}: not a valid .npy file: format version {v} is not supported (1, 2 or 3)"),
        None => (None, 0),
    };
    let Some(header_len) = header_len else {
        bail!("{name}: not a valid .npy file: the file is truncated inside the preamble ({} bytes)", pre.len());
    };
    if header_len > MAX_NPY_HEADER_BYTES {
        bail!("{name}: not a valid .npy file: the header claims {header_len} bytes (at most {MAX_NPY_HEADER_BYTES})");
    }
    if let Some(len) = file_len {
        if preamble + header_len > len {
            bail!("{name}: the file is truncated: the header claims {header_len} bytes but the file has {len} in all");
        }
    }
    let mut header = Vec::new();
    file.by_ref()
        .take(preamble + header_len)
        .read_to_end(&mut header)
        .with_context(|| format!("{name}: cannot read"))?;
    file.seek(SeekFrom::Start(0)).with_context(|| format!("{name}: cannot read"))?;
    let depth = npy_header_depth(header.get(usize::try_from(preamble).unwrap_or(0)..).unwrap_or(&[]));
    if depth > MAX_NPY_HEADER_DEPTH {
        bail!(
            "{name}: not a valid .npy file: the header nests brackets {depth} deep (a NumPy header is one flat \
             dictionary: descr, fortran_order, shape)"
        );
    }
    Ok(())
}

/// Deepest bracket nesting a `.npy` header may have: the dictionary, a
/// structured dtype's list and tuple, a shape tuple.
pub(crate) const MAX_NPY_HEADER_DEPTH: usize = 4;

/// Deepest nesting of `(`, `[` and `{` in a `.npy` header. `npyz`'s header
/// parser takes time exponential in the nesting depth (16 nested braces in a
/// 118-byte header took over a minute; found by fuzzing), so headers deeper
/// than [`MAX_NPY_HEADER_DEPTH`] are refused before it runs.
pub(crate) fn npy_header_depth(header: &[u8]) -> usize {
    let (mut depth, mut deepest) = (0usize, 0usize);
    for b in header {
        match b {
            b'(' | b'[' | b'{' => {
                depth += 1;
                deepest = deepest.max(depth);
            }
            b')' | b']' | b'}' => depth = depth.saturating_sub(1),
            _ => {}
        }
    }
    deepest
}

fn npy_rows(
    path: &Path,
    progress: bool,
    f: impl FnMut(usize, &[f32], Option<u8>) -> Result<()>,
) -> Result<Vec<String>> {
    let name = path.display();
    let (mut file, file_len) = open(path)?;
    check_npy_preamble(path, &mut file, file_len)?;
    let consumed = Rc::new(Cell::new(0u64));
    let reader = CountingReader { inner: BufReader::new(file), count: Rc::clone(&consumed) };
    let npy = npyz::NpyFile::new(reader).with_context(|| format!("{name}: not a valid .npy file"))?;

    let dims = npy.shape().to_vec();
    let shape_text = format!("{dims:?}");
    let (rows, cols, one_dim) = match dims.as_slice() {
        [t] => (*t, 1, true),
        [t, x] => (*t, *x, false),
        _ => bail!(
            "{name}: the array has shape {shape_text} ({} dimensions); expected [T] or [T, X] (time steps, features)",
            dims.len()
        ),
    };
    let too_big = || anyhow!("{name}: shape {shape_text} is too large for this machine");
    let shape = NpyShape {
        rows: usize::try_from(rows).map_err(|_| too_big())?,
        cols: usize::try_from(cols).map_err(|_| too_big())?,
        one_dim,
    };
    if shape.cols == 0 {
        bail!("{name} has no feature columns (shape {shape_text})");
    }
    if shape.rows == 0 {
        bail!("{name} has no data rows (shape {shape_text})");
    }
    // A model input has at most 65,536 features (the blob's dimension limit).
    if shape.cols > MAX_COLUMNS {
        bail!("{name} has {} feature columns (shape {shape_text}); at most {MAX_COLUMNS} are supported", shape.cols);
    }
    // Fortran order stores column after column; it only matches row-major
    // order when there is one row or one column.
    if npy.order() == npyz::Order::Fortran && shape.rows > 1 && shape.cols > 1 {
        bail!(
            "{name}: the array is stored in Fortran (column-major) order, which cannot be read row by row; \
             save it with `np.save(path, np.ascontiguousarray(a))`"
        );
    }

    let dtype = npy.dtype();
    let item_bytes: u64 = match &dtype {
        npyz::DType::Plain(ts) if ts.type_char() == npyz::TypeChar::Float && matches!(ts.size_field(), 4 | 8) => {
            ts.size_field()
        }
        other => bail!(
            "{name}: dtype {} is not supported (shape {shape_text}); expected float32 or float64, \
             e.g. save `a.astype(np.float32)`",
            other.descr()
        ),
    };

    // Catch a truncated file before streaming any of it.
    let header_bytes = consumed.get();
    if let Some(len) = file_len {
        let data = rows.checked_mul(cols).and_then(|n| n.checked_mul(item_bytes)).unwrap_or(u64::MAX);
        let have = len.saturating_sub(header_bytes);
        if have < data {
            bail!(
                "{name}: the file is truncated: shape {shape_text} of {} needs {data} bytes of data but only \
                 {have} follow the header",
                dtype.descr()
            );
        }
    }

    let progress = Progress::new(path, progress, file_len);
    let columns: Vec<String> = (0..shape.cols).map(|i| format!("x{i}")).collect();
    let ctx = NpyStream { path, shape, consumed, progress };
    if item_bytes == 4 {
        let data = npy.data::<f32>().map_err(|e| anyhow!("{name}: {e}"))?;
        ctx.run(data, f)?;
    } else {
        let data = npy.data::<f64>().map_err(|e| anyhow!("{name}: {e}"))?;
        ctx.run(data, f)?;
    }
    Ok(columns)
}

struct NpyStream<'a> {
    path: &'a Path,
    shape: NpyShape,
    consumed: Rc<Cell<u64>>,
    progress: Progress,
}

impl NpyStream<'_> {
    fn run<T: Into<f64>>(
        mut self,
        mut data: impl Iterator<Item = io::Result<T>>,
        mut f: impl FnMut(usize, &[f32], Option<u8>) -> Result<()>,
    ) -> Result<()> {
        let name = self.path.display();
        let shape = self.shape;
        let mut row: Vec<f32> = Vec::with_capacity(shape.cols);
        for r in 0..shape.rows {
            row.clear();
            for c in 0..shape.cols {
                let at = || format!("{name}: element {} (row {r}, column \"x{c}\")", shape.at(r, c));
                let wide: f64 = data
                    .next()
                    .ok_or_else(|| anyhow!("{}: the data ends early", at()))?
                    .with_context(|| format!("{}: cannot read", at()))?
                    .into();
                // Rounds to nearest; values beyond the f32 range become infinite.
                #[allow(clippy::cast_possible_truncation)]
                let v = wide as f32;
                if !wide.is_finite() {
                    bail!("{}: {wide} is not a finite number", at());
                }
                if !v.is_finite() {
                    bail!("{}: {wide} is outside the f32 range", at());
                }
                row.push(v);
            }
            f(r, &row, None).with_context(|| format!("{name}: row {r}"))?;
            self.progress.update(self.consumed.get());
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::fs;

    /// Writes `text` to `name` in a fresh directory.
    fn file(name: &str, text: &str) -> (tempfile::TempDir, PathBuf) {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join(name);
        fs::write(&path, text).unwrap();
        (dir, path)
    }

    /// Reads `text` as `data.csv` and returns the error message (with context).
    fn csv_err(text: &str) -> String {
        let (_dir, path) = file("data.csv", text);
        format!("{:#}", read(&path, false).unwrap_err())
    }

    fn assert_has(msg: &str, parts: &[&str]) {
        for p in parts {
            assert!(msg.contains(p), "message {msg:?} lacks {p:?}");
        }
    }

    /// Hand-built `.npy` v1.0 file: magic, version, header length, header
    /// dict padded to 64 bytes, then `data` (already in the dtype's bytes).
    fn npy_bytes(descr: &str, fortran: bool, shape: &[u64], data: &[u8]) -> Vec<u8> {
        let shape_text = match shape {
            [n] => format!("({n},)"),
            _ => format!("({})", shape.iter().map(u64::to_string).collect::<Vec<_>>().join(", ")),
        };
        let fortran = if fortran { "True" } else { "False" };
        let mut dict = format!("{{'descr': '{descr}', 'fortran_order': {fortran}, 'shape': {shape_text}, }}");
        while (10 + dict.len() + 1) % 64 != 0 {
            dict.push(' ');
        }
        dict.push('\n');
        let mut out = b"\x93NUMPY\x01\x00".to_vec();
        out.extend_from_slice(&u16::try_from(dict.len()).unwrap().to_le_bytes());
        out.extend_from_slice(dict.as_bytes());
        out.extend_from_slice(data);
        out
    }

    fn npy_file(descr: &str, fortran: bool, shape: &[u64], data: &[u8]) -> (tempfile::TempDir, PathBuf) {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("data.npy");
        fs::write(&path, npy_bytes(descr, fortran, shape, data)).unwrap();
        (dir, path)
    }

    fn le_f32(v: &[f32]) -> Vec<u8> {
        v.iter().flat_map(|x| x.to_le_bytes()).collect()
    }

    #[test]
    fn csv_with_label() {
        let (_dir, path) = file("data.csv", "vib_x, Label ,vib_z\n 1.5 ,0, -2\n3e-2,1,4\n\n-0.25 , 1 ,1e3\n");
        let d = read(&path, true).unwrap();
        assert_eq!(d.columns, ["vib_x", "vib_z"]);
        assert_eq!(d.rows, vec![vec![1.5, -2.0], vec![0.03, 4.0], vec![-0.25, 1000.0]]);
        assert_eq!(d.labels, Some(vec![0, 1, 1]));
        assert_eq!((d.len(), d.features(), d.is_empty()), (3, 2, false));
        assert_eq!(d.path, path);
    }

    #[test]
    fn csv_without_label_and_streaming() {
        let (_dir, path) = file("DATA.CSV", "\u{feff}a,b\n1,2\n3,4\n");
        let mut seen = Vec::new();
        let cols = for_each_row(&path, false, |i, row, label| {
            seen.push((i, row.to_vec(), label));
            Ok(())
        })
        .unwrap();
        assert_eq!(cols, ["a", "b"]);
        assert_eq!(seen, vec![(0, vec![1.0, 2.0], None), (1, vec![3.0, 4.0], None)]);
        assert_eq!(read(&path, false).unwrap().labels, None);
    }

    #[test]
    fn csv_callback_error_gets_line() {
        let (_dir, path) = file("data.csv", "a\n1\n2\n");
        let err = for_each_row(&path, false, |i, _, _| if i == 1 { bail!("stop here") } else { Ok(()) }).unwrap_err();
        assert_has(&format!("{err:#}"), &["data.csv: line 3", "stop here"]);
    }

    #[test]
    fn csv_not_a_number() {
        let msg = csv_err("vib_x,vib_y,vib_z\n1,2,3\n1,2, abc \n");
        assert_has(&msg, &["data.csv: line 3, column 3 (\"vib_z\"): \"abc\" is not a number"]);
    }

    #[test]
    fn csv_empty_cell() {
        let msg = csv_err("a,b\n1,\n");
        assert_has(&msg, &["data.csv", "line 2", "column 2 (\"b\")", "empty cell"]);
    }

    #[test]
    fn csv_non_finite() {
        for bad in ["NaN", "nan", "inf", "-Infinity"] {
            let msg = csv_err(&format!("a,b\n1,2\n{bad},2\n"));
            assert_has(&msg, &["data.csv", "line 3", "column 1 (\"a\")", "is not a finite number"]);
        }
        let msg = csv_err("a,b\n1,1e39\n");
        assert_has(&msg, &["data.csv", "line 2", "column 2 (\"b\")", "outside the f32 range"]);
    }

    #[test]
    fn csv_bad_label() {
        for bad in ["2", "-1", "0.5", "yes", ""] {
            let msg = csv_err(&format!("a,label\n1,0\n1,{bad}\n"));
            assert_has(&msg, &["data.csv", "line 3", "column 2 (\"label\")"]);
        }
        let (_dir, path) = file("data.csv", "a,LABEL\n1,1.0\n2,0.0\n");
        assert_eq!(read(&path, false).unwrap().labels, Some(vec![1, 0]));
    }

    #[test]
    fn csv_ragged_rows() {
        let msg = csv_err("a,b,c\n1,2,3\n1,2\n");
        assert_has(&msg, &["data.csv", "line 3", "column 3 (\"c\")", "missing", "2 fields", "3 columns"]);
        let msg = csv_err("a,b\n1,2\n1,2,3\n");
        assert_has(&msg, &["data.csv", "line 3", "column 3", "extra field \"3\""]);
    }

    #[test]
    fn csv_invalid_utf8() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("data.csv");
        fs::write(&path, b"a,b\n1,2\n3,\xff\n").unwrap();
        let msg = format!("{:#}", read(&path, false).unwrap_err());
        assert_has(&msg, &["data.csv: line 3, column 2 (\"b\")", "UTF-8"]);
        fs::write(&path, b"a,\xff\n1,2\n").unwrap();
        let msg = format!("{:#}", read(&path, false).unwrap_err());
        assert_has(&msg, &["data.csv: line 1, column 2", "UTF-8"]);
    }

    #[test]
    fn large_files_with_progress() {
        let rows = 150_000;
        let mut text = String::from("a,b,label\n");
        for i in 0..rows {
            let _ = writeln!(text, "{}.5,-2.25,{}", i % 100, i % 2);
        }
        assert!(text.len() as u64 > PROGRESS_MIN_BYTES);
        let (_dir, path) = file("big.csv", &text);
        let d = read(&path, true).unwrap();
        assert_eq!((d.len(), d.features()), (rows, 2));
        assert_eq!(d.rows.last(), Some(&vec![99.5, -2.25]));

        let values: Vec<f32> = (0..rows * 2).map(|i| i as f32).collect();
        let (_dir2, path) = npy_file("<f4", false, &[rows as u64, 2], &le_f32(&values));
        let mut n = 0;
        for_each_row(&path, true, |i, row, _| {
            assert_eq!(row, [(2 * i) as f32, (2 * i + 1) as f32]);
            n += 1;
            Ok(())
        })
        .unwrap();
        assert_eq!(n, rows);
    }

    #[test]
    fn csv_no_rows() {
        assert_has(&csv_err("a,b\n"), &["data.csv", "has no data rows"]);
        assert_has(&csv_err("a,b"), &["data.csv", "has no data rows"]);
        assert_has(&csv_err(""), &["data.csv", "has no data rows"]);
    }

    #[test]
    fn csv_bad_header() {
        assert_has(&csv_err("label\n1\n"), &["data.csv", "no feature columns"]);
        assert_has(&csv_err(",a\n0,1\n"), &["data.csv", "line 1, column 1", "no name"]);
        assert_has(&csv_err("a,b,a\n0,1,2\n"), &["data.csv", "line 1, column 3 (\"a\")", "column 1"]);
        assert_has(&csv_err("label,a,Label\n0,1,1\n"), &["data.csv", "line 1, column 3", "second label"]);
    }

    #[test]
    fn unsupported_and_missing_files() {
        let (_dir, path) = file("data.txt", "a\n1\n");
        assert_has(&format!("{:#}", read(&path, false).unwrap_err()), &["data.txt", ".csv", ".npy"]);
        let (_dir, path) = file("data", "a\n1\n");
        assert_has(&format!("{:#}", read(&path, false).unwrap_err()), &["data", "no extension", ".csv"]);
        let dir = tempfile::tempdir().unwrap();
        let missing = dir.path().join("nope.csv");
        assert_has(&format!("{:#}", read(&missing, false).unwrap_err()), &["nope.csv"]);
    }

    #[test]
    fn npy_f32_2d() {
        let (_dir, path) = npy_file("<f4", false, &[3, 2], &le_f32(&[1.0, -2.0, 0.5, 3.0, 1e-3, 7.0]));
        let d = read(&path, false).unwrap();
        assert_eq!(d.columns, ["x0", "x1"]);
        assert_eq!(d.rows, vec![vec![1.0, -2.0], vec![0.5, 3.0], vec![1e-3, 7.0]]);
        assert_eq!(d.labels, None);
    }

    #[test]
    fn npy_f64_and_big_endian() {
        let values = [0.1f64, 2.5, -3.0, 1e-10];
        let le: Vec<u8> = values.iter().flat_map(|x| x.to_le_bytes()).collect();
        let (_dir, path) = npy_file("<f8", false, &[2, 2], &le);
        let d = read(&path, false).unwrap();
        assert_eq!(d.rows, vec![vec![0.1f32, 2.5], vec![-3.0, 1e-10]]);

        let be: Vec<u8> = [1.5f32, -4.0].iter().flat_map(|x| x.to_be_bytes()).collect();
        let (_dir2, path) = npy_file(">f4", false, &[2], &be);
        assert_eq!(read(&path, false).unwrap().rows, vec![vec![1.5], vec![-4.0]]);
    }

    #[test]
    fn npy_1d() {
        let (_dir, path) = npy_file("<f4", false, &[3], &le_f32(&[1.0, 2.0, 3.0]));
        let d = read(&path, false).unwrap();
        assert_eq!(d.columns, ["x0"]);
        assert_eq!(d.rows, vec![vec![1.0], vec![2.0], vec![3.0]]);
        // One column is the same layout in Fortran order.
        let (_dir2, path) = npy_file("<f4", true, &[3, 1], &le_f32(&[1.0, 2.0, 3.0]));
        assert_eq!(read(&path, false).unwrap().rows.len(), 3);
    }

    #[test]
    fn npy_written_by_npyz() {
        use npyz::WriterBuilder;
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("w.NPY");
        let mut w = npyz::WriteOptions::<f64>::new()
            .default_dtype()
            .shape(&[2, 3])
            .writer(io::BufWriter::new(File::create(&path).unwrap()))
            .begin_nd()
            .unwrap();
        w.extend([1.0, 2.0, 3.0, 4.0, 5.0, 6.0]).unwrap();
        w.finish().unwrap();
        let d = read(&path, false).unwrap();
        assert_eq!(d.rows, vec![vec![1.0, 2.0, 3.0], vec![4.0, 5.0, 6.0]]);
    }

    #[test]
    fn npy_non_finite() {
        let (_dir, path) = npy_file("<f4", false, &[2, 3], &le_f32(&[1.0, 2.0, 3.0, 4.0, f32::NAN, 6.0]));
        let msg = format!("{:#}", read(&path, false).unwrap_err());
        assert_has(&msg, &["data.npy", "[1, 1]", "row 1", "\"x1\"", "NaN is not a finite number"]);
        let big: Vec<u8> = [1.0f64, 1e300].iter().flat_map(|x| x.to_le_bytes()).collect();
        let (_dir2, path) = npy_file("<f8", false, &[2], &big);
        let msg = format!("{:#}", read(&path, false).unwrap_err());
        assert_has(&msg, &["data.npy", "[1]", "outside the f32 range"]);
    }

    #[test]
    fn npy_refusals() {
        let err = |descr: &str, fortran: bool, shape: &[u64], data: &[u8]| {
            let (_dir, path) = npy_file(descr, fortran, shape, data);
            format!("{:#}", read(&path, false).unwrap_err())
        };
        assert_has(&err("<i4", false, &[2], &[0; 8]), &["data.npy", "dtype '<i4'", "float32"]);
        assert_has(&err("<f4", false, &[1, 2, 2], &[0; 16]), &["data.npy", "[1, 2, 2]", "[T, X]"]);
        assert_has(&err("<f4", true, &[2, 2], &[0; 16]), &["data.npy", "Fortran"]);
        assert_has(&err("<f4", false, &[0, 2], &[]), &["data.npy", "no data rows"]);
        assert_has(&err("<f4", false, &[2, 0], &[]), &["data.npy", "no feature columns"]);
        assert_has(&err("<f4", false, &[3, 2], &[0; 20]), &["data.npy", "truncated", "24 bytes", "20"]);
        let (_dir, path) = file("data.npy", "not numpy at all");
        assert_has(&format!("{:#}", read(&path, false).unwrap_err()), &["data.npy", "not a valid .npy"]);
    }

    /// Found by the `data_npy` fuzz target: a 118-byte header with 31 nested
    /// braces kept `npyz`'s header parser busy for minutes (its time grows
    /// exponentially with the nesting). Refused from the nesting depth now.
    #[test]
    fn npy_deeply_nested_header_is_refused_quickly() {
        let bytes: [u8; 164] = [
            147, 78, 85, 77, 80, 89, 1, 0, 118, 0, 123, 39, 100, 101, 115, 99, 46, 110, 112, 121, 114, 100, 101, 114,
            39, 58, 123, 123, 123, 123, 123, 123, 123, 123, 123, 123, 123, 123, 123, 123, 123, 123, 123, 123, 123, 123,
            123, 123, 123, 123, 123, 123, 123, 123, 123, 123, 123, 32, 70, 97, 108, 115, 101, 44, 32, 39, 97, 110, 95,
            111, 114, 100, 101, 92, 114, 39, 58, 32, 70, 97, 108, 115, 9, 0, 101, 44, 32, 39, 115, 104, 97, 58, 32, 39,
            60, 7, 48, 7, 7, 7, 7, 7, 7, 7, 7, 7, 7, 7, 7, 7, 7, 7, 7, 7, 7, 7, 7, 7, 7, 7, 7, 7, 7, 7, 7, 7, 7, 7, 7,
            7, 7, 7, 7, 7, 7, 7, 7, 7, 7, 7, 7, 7, 7, 7, 7, 7, 7, 7, 7, 7, 7, 7, 102, 56, 39, 44, 32, 32, 32, 0, 0,
            192, 13, 10,
        ];
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("data.npy");
        fs::write(&path, bytes).unwrap();
        let t = std::time::Instant::now();
        let msg = format!("{:#}", read(&path, false).unwrap_err());
        assert_has(&msg, &["data.npy", "nests brackets 32 deep"]);
        assert!(t.elapsed().as_secs() < 5, "took {:?}", t.elapsed());
        // A valid header's depth is 2 (the dictionary and the shape tuple).
        let ok = npy_bytes("<f4", false, &[1, 2], &le_f32(&[1.0, 2.0]));
        assert_eq!(npy_header_depth(&ok[10..]), 2);
        assert_eq!(npy_header_depth(b"{[({)]}}"), 4);
    }

    /// Found by the `data_npy` fuzz target: a version-2 preamble claiming a
    /// header of 2.4 GB made `npyz` allocate it before reading. The preamble
    /// is now checked first, against a limit and the file's length.
    #[test]
    fn npy_huge_header_length_is_refused_before_allocating() {
        let bytes: [u8; 30] = [
            147, 78, 85, 77, 80, 89, 2, 0, 229, 118, 2, 147, 78, 85, 77, 123, 39, 100, 101, 39, 115, 60, 114, 123, 39,
            100, 101, 39, 115, 60,
        ];
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("data.npy");
        fs::write(&path, bytes).unwrap();
        let msg = format!("{:#}", read(&path, false).unwrap_err());
        assert_has(&msg, &["data.npy", "header claims 2466412261 bytes"]);
        // Within the limit but longer than the file: truncated.
        let mut v1 = npy_bytes("<f4", false, &[1, 1], &le_f32(&[1.0]));
        v1[8..10].copy_from_slice(&4000u16.to_le_bytes());
        fs::write(&path, &v1).unwrap();
        assert_has(&format!("{:#}", read(&path, false).unwrap_err()), &["data.npy", "truncated", "4000 bytes"]);
        for (bytes, what) in
            [(&b""[..], "empty"), (&b"\x93NUMPY\x01"[..], "preamble"), (&b"\x93NUMPY\x07\x00\x10\x00"[..], "version 7")]
        {
            fs::write(&path, bytes).unwrap();
            assert_has(&format!("{:#}", read(&path, false).unwrap_err()), &["data.npy", what]);
        }
    }

    #[test]
    fn expect_features_message() {
        let d = Dataset {
            path: PathBuf::from("data.csv"),
            columns: vec!["a".into(), "b".into(), "c".into()],
            rows: vec![vec![0.0; 3]],
            labels: None,
        };
        assert!(d.expect_features(3).is_ok());
        let msg = d.expect_features(4).unwrap_err().to_string();
        assert_eq!(msg, "data.csv has 3 feature columns (a, b, c) but the model takes 4 inputs");
    }

    /// `push_f32` gives the bytes of `{}` (the old writer's formatting).
    fn check_push_f32(v: f32) {
        let mut out = Vec::new();
        push_f32(&mut out, v);
        assert_eq!(String::from_utf8(out).unwrap(), format!("{v}"), "bits {:#010x}", v.to_bits());
    }

    #[test]
    fn push_f32_matches_display() {
        let special = [0.0, -0.0, f32::NAN, -f32::NAN, f32::INFINITY, f32::NEG_INFINITY, f32::MAX, f32::MIN];
        let tiny = [f32::MIN_POSITIVE, f32::EPSILON, 1e-45, -1e-45, 1.1754942e-38, 0.1, 0.3, 1.0 / 3.0];
        // Exact ties, where ryu alone would round to even: 2^-12, 2^21 + 0.25, 9/2^11.
        let ties = [2f32.powi(-12), 2_097_152.0 + 0.25, 9.0 / 2048.0, -9.0 / 2048.0];
        for v in special.into_iter().chain(tiny).chain(ties) {
            check_push_f32(v);
        }
        // Every raw device integer (`run --int`) and its real value at a few scales.
        for i in i16::MIN..=i16::MAX {
            for s in [1.0f32, 3.0517578e-5, 1.25 / 32767.0, 7.3e-4, 0.1] {
                check_push_f32(i as f32 * s);
            }
        }
        // Powers of ten and their neighbours: where the layout changes
        // (ryu's exponent form starts at 1e13 and below 1e-5).
        for e in -45..=38 {
            let p: f32 = format!("1e{e}").parse().unwrap();
            for b in [p.to_bits().saturating_sub(1), p.to_bits(), p.to_bits() + 1] {
                check_push_f32(f32::from_bits(b));
                check_push_f32(-f32::from_bits(b));
            }
        }
        // A spread of bit patterns over the whole range (every exponent).
        for b in (0..u32::MAX).step_by(4999) {
            check_push_f32(f32::from_bits(b));
        }
    }

    /// All 2^32 bit patterns (about 7 minutes on 2 cores in release):
    /// `cargo test --release -p lapwing-tools --lib -- --ignored push_f32_matches_display_for_every_f32`.
    #[test]
    #[ignore = "exhaustive: run by hand after touching push_f32 or updating ryu"]
    fn push_f32_matches_display_for_every_f32() {
        let threads = std::thread::available_parallelism().map_or(1, usize::from) as u64;
        let bad: u64 = std::thread::scope(|s| {
            let hs: Vec<_> = (0..threads)
                .map(|t| {
                    s.spawn(move || {
                        let (mut a, mut b, mut bad) = (Vec::new(), String::new(), 0u64);
                        for bits in (t..1u64 << 32).step_by(threads as usize) {
                            let v = f32::from_bits(bits as u32);
                            a.clear();
                            b.clear();
                            push_f32(&mut a, v);
                            let _ = write!(b, "{v}");
                            if a != b.as_bytes() {
                                bad += 1;
                            }
                        }
                        bad
                    })
                })
                .collect();
            hs.into_iter().map(|h| h.join().unwrap()).sum()
        });
        assert_eq!(bad, 0);
    }

    /// The sink writes what the CSV writer with `{}` formatting wrote before
    /// (header quoting, delimiters, terminators), byte for byte.
    #[test]
    fn write_csv_matches_the_csv_writer() {
        let header = vec!["a, with comma".to_string(), "q\"uote".to_string(), "y0".to_string()];
        let mut rows = vec![vec![0.1f32, -1e-7, 1.0], vec![f32::MAX, f32::MIN_POSITIVE, -0.0], vec![1e21, 42.0, -3.5]];
        rows.extend((0..1000).map(|i| vec![i as f32 * 1.3e-3, -(i as f32) / 7.0, (i as f32).sin() * 1e6]));
        let mut old = csv::Writer::from_writer(Vec::new());
        old.write_record(&header).unwrap();
        for r in &rows {
            for v in r {
                old.write_field(format!("{v}")).unwrap();
            }
            old.write_record(None::<&[u8]>).unwrap();
        }
        let old = old.into_inner().unwrap();
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("out.csv");
        write_csv(&path, &header, &rows).unwrap();
        assert_eq!(fs::read(&path).unwrap(), old);
        let one = dir.path().join("one.csv");
        write_csv(&one, &["x".to_string()], [[0.5f32], [-2.0]]).unwrap();
        assert_eq!(fs::read_to_string(&one).unwrap(), "x\n0.5\n-2\n");
    }

    #[test]
    fn write_csv_round_trip() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("out.csv");
        fs::write(&path, "old content\n").unwrap();
        let header = vec!["a, with comma".to_string(), "b".to_string(), "label".to_string()];
        let rows = vec![vec![0.1f32, -1e-7, 1.0], vec![f32::MAX, f32::MIN_POSITIVE, 0.0], vec![1.0 / 3.0, 42.0, 1.0]];
        write_csv(&path, &header, &rows).unwrap();
        let d = read(&path, false).unwrap();
        assert_eq!(d.columns, ["a, with comma", "b"]);
        let features: Vec<Vec<f32>> = rows.iter().map(|r| r[..2].to_vec()).collect();
        assert_eq!(d.rows, features, "values must read back bit for bit");
        assert_eq!(d.labels, Some(vec![1, 0, 1]));
        // Only the destination is left in the directory.
        assert_eq!(fs::read_dir(dir.path()).unwrap().count(), 1);
    }

    #[test]
    fn write_csv_missing_directory() {
        let dir = tempfile::tempdir().unwrap();
        let missing = dir.path().join("no_such_dir");
        let path = missing.join("out.csv");
        let msg = format!("{:#}", write_csv(&path, &["a".to_string()], [[1.0f32]]).unwrap_err());
        assert_has(&msg, &["no_such_dir", "does not exist"]);
        assert!(!missing.exists());
        assert_eq!(fs::read_dir(dir.path()).unwrap().count(), 0);
    }

    #[test]
    fn write_csv_bad_row_leaves_nothing() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("out.csv");
        let rows: Vec<Vec<f32>> = vec![vec![1.0, 2.0], vec![3.0]];
        let msg = format!("{:#}", write_csv(&path, &["a".to_string(), "b".to_string()], &rows).unwrap_err());
        assert_has(&msg, &["out.csv", "row 1", "1 value", "2 columns"]);
        assert_eq!(fs::read_dir(dir.path()).unwrap().count(), 0);
    }
}
