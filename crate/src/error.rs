//! The one error type of the core. Every variant carries the facts a user needs to act on it;
//! `Display` renders one plain sentence. Front ends add context (a file name) and never panic.

use std::fmt;

/// Everything that can go wrong between bytes and an analysis.
#[derive(Debug, Clone, PartialEq)]
pub enum Error {
    /// Reading from the byte source failed (a file system or browser error).
    Io {
        /// What the operating system or browser said.
        message: String,
    },
    /// The data ends before a part that the header promises.
    Truncated {
        /// Which part was being read.
        what: &'static str,
        /// Bytes needed from the start of the source.
        needed: u64,
        /// Bytes the source actually has.
        available: u64,
    },
    /// The bytes are not in the expected format at all.
    BadFormat {
        /// The format that was expected, for example "NumPy .npy".
        format: &'static str,
        /// What is wrong, in plain words.
        detail: String,
    },
    /// The file's element type is one the tool cannot read.
    UnsupportedDtype {
        /// The type as the file spells it.
        dtype: String,
        /// Why it is refused, or what to do instead.
        hint: String,
    },
    /// A tensor name that the file does not contain.
    NoSuchTensor {
        /// The requested name.
        name: String,
        /// A few names that do exist, to help the user.
        available: Vec<String>,
        /// How many tensors the file holds (a .npy file's one tensor has no name).
        count: usize,
    },
    /// A name pattern that takes no tensor of the files given.
    NothingSelected {
        /// The pattern as given.
        pattern: String,
        /// What left the tensors out.
        detail: String,
    },
    /// The file holds several tensors, or none, and the caller did not say which.
    TensorNotChosen {
        /// How many tensors the file holds.
        count: usize,
    },
    /// Pasted text that does not form a matrix.
    Parse {
        /// 1-based line of the problem.
        line: usize,
        /// 1-based column (character) of the problem.
        column: usize,
        /// What is wrong there.
        detail: String,
    },
    /// A shape that cannot be analysed (empty, or too large to hold).
    BadShape {
        /// The shape as given.
        shape: Vec<usize>,
        /// Why it is refused.
        detail: String,
    },
    /// The tensor holds NaN or infinite values, so no scale can be fitted.
    NonFinite {
        /// Count of NaN values.
        nan: usize,
        /// Count of infinite values.
        inf: usize,
        /// Row of the first non-finite value (in the 2-D view).
        first_row: usize,
        /// Column of the first non-finite value (in the 2-D view).
        first_col: usize,
    },
    /// A recipe that cannot be applied.
    BadRecipe {
        /// What is wrong and what is allowed.
        detail: String,
    },
    /// Calibration data that cannot serve the weight.
    BadCalibration {
        /// What is wrong and what is expected.
        detail: String,
    },
    /// A linear-algebra step failed (for example a matrix that is not positive definite).
    Numerical {
        /// What failed and what to change.
        detail: String,
    },
    /// A scale too large for its storage type.
    ScaleOverflow {
        /// The scale that was needed.
        scale: f32,
        /// The storage type that cannot hold it.
        dtype: &'static str,
        /// Row of the group that needed it.
        row: usize,
        /// First column of that group.
        col: usize,
        /// The scale fits its type, but the grid's far end passes the largest f32.
        beyond_f32: bool,
    },
    /// A tensor other than the one a result was taken from, given to make that result's
    /// reconstruction again.
    NotTheAnalysedTensor {
        /// The shape of the tensor given.
        shape: Vec<usize>,
    },
    /// An export of a result that needs more memory than is left.
    ExportTooLarge {
        /// Values of the tensor whose reconstruction it writes.
        elements: usize,
        /// Bytes the export would hold at its peak ([`crate::footprint::export_bytes`]).
        needed: u64,
        /// Bytes left.
        available: u64,
    },
    /// A codebook whose levels cannot be stored in the f16 that codebooks keep them in.
    LevelOverflow {
        /// The row whose codebook it is, or `None` for one codebook of the whole tensor.
        row: Option<usize>,
        /// The largest |value| the codebook was fitted to.
        max_abs: f32,
    },
}

/// Writes through to a formatter on one line: messages quote text from files, pastes and
/// options, and a line break there would split the one line a front end prints, so control
/// characters are written as escapes (`\n`).
struct OneLine<'a, 'b>(&'a mut fmt::Formatter<'b>);

impl fmt::Write for OneLine<'_, '_> {
    fn write_str(&mut self, text: &str) -> fmt::Result {
        for ch in text.chars() {
            if ch.is_control() {
                write!(self.0, "{}", ch.escape_default())?;
            } else {
                fmt::Write::write_char(self.0, ch)?;
            }
        }
        Ok(())
    }
}

impl fmt::Display for Error {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        use fmt::Write as _;
        let f = &mut OneLine(f);
        match self {
            Error::Io { message } => write!(f, "could not read the data: {message}"),
            Error::Truncated { what, needed, available } => write!(
                f,
                "the file is truncated: the {what} needs {needed} bytes but the file has only {available}"
            ),
            Error::BadFormat { format, detail } => write!(f, "not a valid {format} file: {detail}"),
            Error::UnsupportedDtype { dtype, hint } => {
                write!(f, "element type '{dtype}' is not supported: {hint}")
            }
            Error::NoSuchTensor { name, available, count } => {
                write!(f, "no tensor named '{name}'")?;
                match (count, available.is_empty()) {
                    (0, _) => write!(f, "; the file holds no tensors"),
                    (_, true) => write!(f, "; the file's one tensor has no name (a .npy file): leave the name out"),
                    (_, false) => write!(f, "; the file has: {}", available.join(", ")),
                }
            }
            Error::NothingSelected { pattern, detail } => write!(f, "no tensor is selected by '{pattern}': {detail}"),
            Error::TensorNotChosen { count: 0 } => write!(f, "the file holds no tensors"),
            Error::TensorNotChosen { count } => write!(
                f,
                "the file holds {count} tensors; choose one by name (for example with --tensor)"
            ),
            Error::Parse { line, column, detail } => {
                write!(f, "line {line}, column {column}: {detail}")
            }
            Error::BadShape { shape, detail } => write!(f, "shape {shape:?} cannot be analysed: {detail}"),
            Error::ExportTooLarge { elements, needed, available } => write!(
                f,
                "exporting the reconstruction of these {elements} values needs about {} of memory beside what is held, and {} are available",
                crate::footprint::size(*needed),
                crate::footprint::size(*available)
            ),
            Error::NotTheAnalysedTensor { shape } => {
                write!(f, "this result was taken from another tensor, so its reconstruction cannot be made from this one (shape {shape:?})")
            }
            Error::NonFinite { nan, inf, first_row, first_col } => write!(
                f,
                "the tensor holds {nan} NaN and {inf} infinite values (first at row {first_row}, column {first_col}); \
                 quantization needs finite values"
            ),
            Error::BadRecipe { detail } => write!(f, "invalid recipe: {detail}"),
            Error::BadCalibration { detail } => write!(f, "calibration data cannot be used: {detail}"),
            Error::Numerical { detail } => write!(f, "{detail}"),
            Error::ScaleOverflow { scale, row, col, beyond_f32: true, .. } => write!(
                f,
                "the group at row {row}, column {col} needs a scale of {scale:e}, which puts the grid's \
                 end beyond the largest f32 (3.4e38); no scale type helps: values this close to the \
                 f32 limit cannot be quantized on this grid"
            ),
            Error::ScaleOverflow { scale, dtype, row, col, .. } => write!(
                f,
                "the scale {scale:e} needed at row {row}, column {col} overflows {dtype}; \
                 choose a wider scale type (bf16 or f32)"
            ),
            Error::LevelOverflow { row, max_abs } => {
                match row {
                    Some(row) => write!(f, "the codebook of row {row}")?,
                    None => write!(f, "the tensor's codebook")?,
                }
                write!(
                    f,
                    " has a level beyond the largest f16 (65504) that codebook levels are stored in (its \
                     values reach {max_abs:e}); use a grid format, whose scales can be bf16 or f32"
                )
            }
        }
    }
}

impl std::error::Error for Error {}

impl From<std::io::Error> for Error {
    fn from(err: std::io::Error) -> Self {
        Error::Io { message: err.to_string() }
    }
}

/// The core's result type.
pub type Result<T> = std::result::Result<T, Error>;
