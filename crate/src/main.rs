//! The `bitloupe` command: parse the arguments, call the core, print or write, and map errors to
//! one line on stderr and a non-zero exit code.

#[cfg(target_arch = "wasm32")]
fn main() {}

#[cfg(not(target_arch = "wasm32"))]
fn main() -> std::process::ExitCode {
    cli::main()
}

/// mimalloc keeps freed blocks for reuse: an analysis's output (as large as the tensor) then
/// lands in memory already mapped rather than in fresh pages the kernel must fault in and clear,
/// which was a third of a round-to-nearest run with the system allocator (DEVELOPERS.md).
#[cfg(not(target_arch = "wasm32"))]
#[global_allocator]
static ALLOCATOR: mimalloc::MiMalloc = mimalloc::MiMalloc;

#[cfg(not(target_arch = "wasm32"))]
mod cli {
    use bitloupe::report::Report;
    use bitloupe::tensor::{self, npy, text, DType, Listing};
    use bitloupe::calib::{CalibKind, Calibration};
    use bitloupe::methods::smooth::{self, ActQuant, DEFAULT_SMOOTHING};
    use bitloupe::formats::Format;
    use bitloupe::recipe::Method;
    use bitloupe::sweep::{self, ParetoBy, SweepSpec};
    use bitloupe::{analyze_with, Granularity, ReadOptions, Recipe, ScaleDType, Tensor};
    use bitloupe::checkpoint::{self, Progress, Selection, Shard};
    use bitloupe::footprint;
    use clap::{Args, Parser, Subcommand};
    use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};
    use std::io::IsTerminal;
    use std::path::{Path, PathBuf};
    use std::process::ExitCode;

    /// Inspect how quantizing one weight tensor changes it: error, where it lands, and the bit cost.
    #[derive(Parser)]
    #[command(name = "bitloupe", version)]
    struct Cli {
        #[command(subcommand)]
        command: Command,
    }

    #[derive(Subcommand)]
    #[allow(clippy::large_enum_variant)] // parsed once; boxing would only add noise
    enum Command {
        /// List the tensors of a .npy or .safetensors file (reads only the header).
        Inspect {
            /// The file to list.
            file: PathBuf,
            #[command(flatten)]
            read: ReadArgs,
        },
        /// Quantize one tensor and report the error and the bit cost.
        Quantize {
            /// A .npy or .safetensors file, or a .txt/.csv/.tsv matrix.
            file: PathBuf,
            /// Which tensor of a file holding several.
            #[arg(long)]
            tensor: Option<String>,
            #[command(flatten)]
            read: ReadArgs,
            #[command(flatten)]
            recipe: RecipeArgs,
            #[command(flatten)]
            calib: CalibArgs,
            /// Also simulate W8A8 (int8 weights per row, int8 activations per tensor or per token)
            /// with and without smoothing; needs an activation sample.
            #[arg(long, value_name = "tensor|token", requires = "calib")]
            w8a8: Option<String>,
            /// Write the dequantized tensor as float32 .npy in the source shape.
            #[arg(long, value_name = "DEQ.npy")]
            out: Option<PathBuf>,
            /// Write the full JSON report here ('-' for standard output) instead of printing a
            /// summary.
            #[arg(long, value_name = "REPORT.json")]
            report: Option<PathBuf>,
            /// Write a Markdown summary (recipe, figures, bit budget, caution).
            #[arg(long, value_name = "SUMMARY.md")]
            markdown: Option<PathBuf>,
            /// Write the per-group figures as CSV.
            #[arg(long, value_name = "GROUPS.csv")]
            groups_csv: Option<PathBuf>,
            /// Write the quantized form (packed codes, scales, zero points, kept values) as
            /// .safetensors in bitloupe's packed layout (README).
            #[arg(long, value_name = "OUT.safetensors")]
            packed: Option<PathBuf>,
        },
        /// Read a packed .safetensors file back and write the dequantized tensor as .npy.
        Unpack {
            /// A file written by `quantize --packed`.
            file: PathBuf,
            /// Where to write the dequantized tensor (float32 .npy, source shape).
            #[arg(long, value_name = "DEQ.npy")]
            out: PathBuf,
        },
        /// Run every combination of the listed choices and mark the Pareto front of bits per
        /// weight against error.
        Sweep {
            /// A .npy or .safetensors file, or a .txt/.csv/.tsv matrix.
            file: PathBuf,
            /// Which tensor of a file holding several.
            #[arg(long)]
            tensor: Option<String>,
            #[command(flatten)]
            read: ReadArgs,
            #[arg(long, value_name = "LIST", default_value = "int", help = format!("Formats, comma-separated, from: {}", Format::NAMES))]
            format: String,
            /// Bits, comma-separated (integer grids and codebooks).
            #[arg(long, value_name = "LIST", default_value = "2,3,4,8")]
            bits: String,
            /// Groups, comma-separated sizes or 'row' / 'tensor'.
            #[arg(long, value_name = "LIST", default_value = "32,64,128,row")]
            group: String,
            /// Methods, comma-separated.
            #[arg(long, value_name = "LIST", default_value = "rtn")]
            method: String,
            /// Scale types, comma-separated.
            #[arg(long, value_name = "LIST", default_value = "f16")]
            scale_dtype: String,
            /// Smoothing strengths, comma-separated ('none' for no smoothing; needs --calib).
            #[arg(long, value_name = "LIST", default_value = "none")]
            smooth: String,
            /// Fractions of weights kept in 16-bit, comma-separated.
            #[arg(long, value_name = "LIST", default_value = "0")]
            keep_frac: String,
            /// The error the front is drawn against: sqnr, mse or output (the default with
            /// calibration, else mse).
            #[arg(long, value_name = "sqnr|mse|output")]
            pareto_by: Option<String>,
            #[command(flatten)]
            calib: CalibArgs,
            /// Write one CSV row per recipe.
            #[arg(long, value_name = "OUT.csv")]
            csv: Option<PathBuf>,
            /// Write the rows as JSON.
            #[arg(long, value_name = "OUT.json")]
            json: Option<PathBuf>,
        },
        /// Run one recipe over every selected tensor of one or more .safetensors files (a
        /// checkpoint's shards) and write one row per tensor plus whole-model totals.
        #[command(after_help = REPORT_HELP)]
        Report(ReportArgs),
        /// Write the built-in demo weight (seeded, invented) as a .npy file, and optionally its
        /// matching activation sample.
        Demo {
            /// Where to write the weight.
            #[arg(long, value_name = "DEMO.npy")]
            out: PathBuf,
            /// Where to write the activation sample [512 tokens, 4096 channels].
            #[arg(long, value_name = "ACTS.npy")]
            activations: Option<PathBuf>,
        },
    }

    const REPORT_HELP: &str = "\
Tensors are taken strictly one at a time: peak memory is about three f32 copies of the largest
selected tensor, whatever the size of the checkpoint, and each tensor's analysis runs on every
thread (its rows split into fixed blocks merged in order, so the figures never depend on
--threads). Tensors left out (name not matching, 1-D, integer or unsupported types, empty) are
rows with status 'skipped' and the reason; a tensor that cannot be read or quantized is a row
with status 'failed' and its message, and the run goes on.

Totals, over the quantized tensors: bits per weight = their bits / their weights; MSE = their
summed squared error / their weights (the weight-weighted mean of the tensors' MSE); relative
error = sqrt(sum of (x - x')^2 / sum of x^2) over all of them, the whole-model figure.

Exit status: 0 when every selected tensor was quantized; 3 when the report was written but some
selected tensor failed; 1 when no report was written (bad file, recipe or selection); 2 for bad
usage. A progress bar is drawn on standard error when it is a terminal.

Per-tensor error is only a proxy: check any recipe on the model's own task before deploying it.";

    #[derive(Args)]
    struct ReportArgs {
        /// The .safetensors files (the shards of one checkpoint, or several checkpoints).
        #[arg(required = true, value_name = "FILE")]
        files: Vec<PathBuf>,
        /// Tensors to quantize, by name; '*' stands for any text (e.g. 'layers.*.weight').
        #[arg(long, value_name = "PATTERN", default_value = "*")]
        pattern: String,
        /// Also quantize 1-D tensors and scalars (norm scales, biases), left as stored by default.
        #[arg(long)]
        include_1d: bool,
        #[command(flatten)]
        recipe: RecipeArgs,
        /// Threads for each tensor's analysis (0: one per core; at most 256).
        #[arg(long, value_name = "N", default_value_t = 0, value_parser = clap::value_parser!(u16).range(0..=256))]
        threads: u16,
        /// Write the report as JSON ('-' for standard output).
        #[arg(long, value_name = "OUT.json|-")]
        json: Option<PathBuf>,
        /// Write one CSV row per tensor and a total row ('-' for standard output; the default
        /// when neither --json nor --csv is given).
        #[arg(long, value_name = "OUT.csv|-")]
        csv: Option<PathBuf>,
    }

    #[derive(Args)]
    struct ReadArgs {
        /// Read raw 2-byte .npy elements (descr V2 or u2) as bfloat16.
        #[arg(long)]
        bf16: bool,
    }

    /// Recipe flags; anything left out takes the core's default.
    #[derive(Args)]
    struct RecipeArgs {
        // The list comes from the core's own, so the help never drifts from what parses.
        #[arg(long, value_name = "FORMAT", help = format!("Number format of the elements: {}; the other flags default to the format's usual choice.", Format::NAMES))]
        format: Option<String>,
        /// NF4: quantize the block scales again (8-bit, blocks of 256).
        #[arg(long)]
        double_quant: bool,
        /// Bits per weight: 2 to 8 for int, 1 to 8 for codebook.
        #[arg(long)]
        bits: Option<u8>,
        /// Elements sharing a scale: a group size (8 to 4096), 'row' or 'tensor'.
        #[arg(long, value_name = "N|row|tensor")]
        group: Option<String>,
        /// Symmetric grid (no zero point).
        #[arg(long, conflicts_with = "asym")]
        sym: bool,
        /// Asymmetric grid with a zero point.
        #[arg(long)]
        asym: bool,
        /// Storage type of the scales.
        #[arg(long, value_name = "f16|bf16|f32|e8m0")]
        scale_dtype: Option<String>,
        /// What chooses the codes.
        #[arg(long, value_name = "rtn|clip|hqq|gptq|awq")]
        method: Option<String>,
        /// Fold smoothing factors of strength ALPHA (0 to 1) into the weight first.
        #[arg(long, value_name = "ALPHA")]
        smooth: Option<f32>,
        /// Keep the K most important input columns in 16-bit.
        #[arg(long, value_name = "K")]
        keep_cols: Option<usize>,
        /// Keep this fraction of the weights (largest |w|) in 16-bit, e.g. 0.005.
        #[arg(long, value_name = "F")]
        keep_frac: Option<f32>,
        /// GPTQ: dampening as a fraction of mean diag(H).
        #[arg(long, value_name = "F")]
        damp: Option<f32>,
        /// GPTQ: process columns in order of decreasing diag(H).
        #[arg(long)]
        act_order: bool,
        /// AWQ: also search a clipping ratio per group.
        #[arg(long)]
        awq_clip: bool,
    }

    impl RecipeArgs {
        fn recipe(&self) -> bitloupe::Result<Recipe> {
            let format = self.format.as_deref().map(str::parse::<Format>).transpose()?.unwrap_or(Format::Int);
            let default = Recipe::for_format(format);
            let recipe = Recipe {
                format,
                double_quant: self.double_quant,
                bits: self.bits.unwrap_or(default.bits),
                granularity: self.group.as_deref().map(str::parse::<Granularity>).transpose()?.unwrap_or(default.granularity),
                symmetric: if self.sym { true } else if self.asym { false } else { default.symmetric },
                scale_dtype: self.scale_dtype.as_deref().map(str::parse::<ScaleDType>).transpose()?.unwrap_or(default.scale_dtype),
                method: self.method.as_deref().map(str::parse::<Method>).transpose()?.unwrap_or(default.method),
                damp: self.damp.unwrap_or(default.damp),
                act_order: self.act_order,
                awq_clip: self.awq_clip,
                smooth: self.smooth,
                keep_cols: self.keep_cols.unwrap_or(default.keep_cols),
                keep_frac: self.keep_frac.unwrap_or(default.keep_frac),
            };
            recipe.validate()?;
            // A flag the recipe would not use is refused rather than silently dropped.
            let unused = |flag: &str, applies: &str| Err(bitloupe::Error::BadRecipe { detail: format!("{flag} applies to {applies} only") });
            if self.bits.is_some() && !matches!(format, Format::Int | Format::Codebook) {
                return unused("--bits", &format!("the int and codebook formats ({} fixes its own width)", format.name()));
            }
            if recipe.method != Method::Gptq && (self.damp.is_some() || self.act_order) {
                return unused(if self.act_order { "--act-order" } else { "--damp" }, "GPTQ (--method gptq)");
            }
            if recipe.method != Method::Awq && self.awq_clip {
                return unused("--awq-clip", "AWQ (--method awq)");
            }
            Ok(recipe)
        }
    }

    /// Calibration flags.
    #[derive(Args)]
    struct CalibArgs {
        /// Calibration data: an activation sample [tokens, cols] or per-column statistics.
        #[arg(long, value_name = "FILE")]
        calib: Option<PathBuf>,
        /// Which tensor of the calibration file.
        #[arg(long, value_name = "NAME", requires = "calib")]
        calib_tensor: Option<String>,
        /// What the calibration tensor holds.
        #[arg(long, value_name = "sample|maxabs|meanabs", default_value = "sample", requires = "calib")]
        calib_kind: String,
    }

    impl CalibArgs {
        /// The calibration for a weight with `cols` input columns, when a file was given.
        /// The calibration for a weight with `cols` input columns, when a file was given, and the
        /// element type its file held.
        fn load(&self, cols: usize, options: ReadOptions) -> Result<Option<(Calibration, DType)>, Failure> {
            let Some(path) = &self.calib else { return Ok(None) };
            let kind = self.calib_kind.parse::<CalibKind>()?;
            // Checked as a weight under the plain recipe (about 1.3 copies of it); the calibration
            // holds its values twice for a moment (the tensor read and the sample kept), which the
            // check does not count: a sample is small beside the weight it calibrates.
            let data = load(path, self.calib_tensor.as_deref(), options, &[Recipe::default()])?;
            Ok(Some((Calibration::from_tensor(&data, kind, cols).map_err(Failure::at(path))?, data.dtype)))
        }
    }

    impl ReadArgs {
        /// `--bf16` with no file of raw 2-byte values to read as bfloat16 is refused, not
        /// dropped, as other flags the command would not use are.
        fn check_used(&self, read: &[DType]) -> Result<(), Failure> {
            if !self.bf16 || read.contains(&DType::BF16) {
                return Ok(());
            }
            let held: Vec<String> = read.iter().map(|d| d.to_string()).collect();
            Err(Failure(format!("--bf16 reads raw 2-byte .npy values as bfloat16, and the files read hold {}; leave it out", held.join(" and "))))
        }
    }

    /// A failure with the context the user needs, printed as one line.
    struct Failure(String);

    impl Failure {
        fn at(path: &Path) -> impl Fn(bitloupe::Error) -> Failure + '_ {
            move |e| Failure(format!("{}: {e}", path.display()))
        }
    }

    impl From<bitloupe::Error> for Failure {
        fn from(e: bitloupe::Error) -> Self {
            Failure(e.to_string())
        }
    }

    pub fn main() -> ExitCode {
        let cli = Cli::parse();
        match run(cli.command) {
            Ok(code) => code,
            Err(Failure(message)) => {
                eprintln!("bitloupe: {message}");
                ExitCode::FAILURE
            }
        }
    }

    fn run(command: Command) -> Result<ExitCode, Failure> {
        let done = match command {
            // The one command whose exit status says more than success or failure.
            Command::Report(args) => return report(args),
            Command::Inspect { file, read } => {
                let (_, listing) = open(&file, read.options())?;
                print!("{}", describe(&listing));
                Ok(())
            }
            Command::Quantize { file, tensor, read, recipe, calib, w8a8, out, report, markdown, groups_csv, packed } => {
                let recipe = recipe.recipe()?;
                let w8a8 = w8a8.as_deref().map(str::parse::<ActQuant>).transpose()?;
                let tensor = load(&file, tensor.as_deref(), read.options(), &[recipe])?;
                let (calibration, calib_dtype) = calib.load(tensor.cols(), read.options())?.unzip();
                read.check_used(&[Some(tensor.dtype), calib_dtype].into_iter().flatten().collect::<Vec<_>>())?;
                check_room(&file, &tensor, &[recipe], calibration.as_ref())?;
                let analysis = analyze_with(&tensor, &recipe, calibration.as_ref(), &mut |_, _| {}).map_err(Failure::at(&file))?;
                let study = match (w8a8, &calibration) {
                    (Some(act), Some(c)) => {
                        let alpha = recipe.smooth.unwrap_or(DEFAULT_SMOOTHING);
                        Some(smooth::study(tensor.values.view(), c, alpha, act, &mut |_, _| {}).map_err(Failure::at(&file))?)
                    }
                    _ => None,
                };
                let mut report_doc = Report::new(&tensor, &analysis);
                if let Some(study) = &study {
                    report_doc = report_doc.with_smoothing(study);
                }
                let mut outputs = Vec::new();
                // Made once for both outputs that need it (a plain recipe's is made again here),
                // once the memory left is known to hold them: the `.npy` file is held while the
                // packed one is made.
                let reconstruction = match out.is_some() || packed.is_some() {
                    true => {
                        if let Some(available) = available_memory() {
                            let npy_beside = if out.is_some() && packed.is_some() { tensor.values.len() as u64 * 4 } else { 0 };
                            footprint::check_export(&analysis, npy_beside, available).map_err(Failure::at(&file))?;
                        }
                        Some(analysis.dequantized(&tensor).map_err(Failure::at(&file))?)
                    }
                    false => None,
                };
                if let (Some(path), Some(values)) = (out, &reconstruction) {
                    outputs.push((path, npy::write_f32(values.as_slice().expect("row-major"), &tensor.shape)));
                }
                if let Some(path) = markdown {
                    outputs.push((path, report_doc.to_markdown().into_bytes()));
                }
                if let Some(path) = groups_csv {
                    outputs.push((path, report_doc.groups_csv().into_bytes()));
                }
                if let (Some(path), Some(values)) = (packed, &reconstruction) {
                    let bytes = bitloupe::packed::pack_reconstruction(&analysis, &tensor.shape, values).map_err(Failure::at(&path))?;
                    outputs.push((path, bytes));
                }
                // Standard output gets the report or the summary once every file is in place.
                let printed = match report {
                    Some(path) if path == Path::new("-") => report_doc.to_json(),
                    Some(path) => {
                        outputs.push((path, report_doc.to_json().into_bytes()));
                        String::new()
                    }
                    None => report_doc.summary(),
                };
                write_all_or_nothing(&outputs, &inputs(&file, &calib))?;
                if !printed.is_empty() {
                    println!("{printed}");
                }
                Ok(())
            }
            Command::Unpack { file, out } => {
                let source = std::fs::File::open(&file).map_err(|e| Failure(format!("{}: cannot open: {e}", file.display())))?;
                let (shape, values) = bitloupe::packed::unpack(&source).map_err(Failure::at(&file))?;
                write_all_or_nothing(&[(out, npy::write_f32(values.as_slice().expect("row-major"), &shape))], &[&file])
            }
            Command::Sweep { file, tensor, read, format, bits, group, method, scale_dtype, smooth, keep_frac, pareto_by, calib, csv, json } => {
                let spec = SweepSpec {
                    formats: list(&format)?,
                    bits: bits.split(',').map(|b| b.trim().parse::<u8>().map_err(|_| Failure(format!("--bits: '{b}' is not a number")))).collect::<Result<_, _>>()?,
                    groups: list(&group)?,
                    methods: list(&method)?,
                    scale_dtypes: list(&scale_dtype)?,
                    smooth: smooth
                        .split(',')
                        .map(|a| match a.trim() {
                            "none" => Ok(None),
                            a => a.parse::<f32>().map(Some).map_err(|_| Failure(format!("--smooth: '{a}' is not a strength or 'none'"))),
                        })
                        .collect::<Result<_, _>>()?,
                    keep_fracs: keep_frac
                        .split(',')
                        .map(|f| f.trim().parse::<f32>().map_err(|_| Failure(format!("--keep-frac: '{f}' is not a fraction"))))
                        .collect::<Result<_, _>>()?,
                };
                let (recipes, skipped) = sweep::recipes(&spec)?;
                let tensor = load(&file, tensor.as_deref(), read.options(), &recipes)?;
                let (calibration, calib_dtype) = calib.load(tensor.cols(), read.options())?.unzip();
                read.check_used(&[Some(tensor.dtype), calib_dtype].into_iter().flatten().collect::<Vec<_>>())?;
                check_room(&file, &tensor, &recipes, calibration.as_ref())?;
                let by = match pareto_by {
                    Some(by) => by.parse::<ParetoBy>()?,
                    None if calibration.is_some() => ParetoBy::Output,
                    None => ParetoBy::Mse,
                };
                // A counter redrawn in place is for a terminal; a log would collect every step.
                let on_terminal = std::io::IsTerminal::is_terminal(&std::io::stderr());
                let (rows, failed) = sweep::run(&tensor, calibration.as_ref(), &recipes, by, &mut |done, total, _| {
                    if on_terminal {
                        eprint!("\rbitloupe: {done}/{total} recipes");
                    }
                })
                .map_err(Failure::at(&file))?;
                if on_terminal {
                    eprintln!();
                }
                let skipped = skipped.merged(failed);
                let mut outputs = Vec::new();
                if let Some(path) = csv {
                    outputs.push((path, sweep::to_csv(&rows).into_bytes()));
                }
                if let Some(path) = json {
                    let doc = serde_json::json!({ "schema": "bitloupe.sweep/1", "pareto_by": by, "skipped": skipped.count(), "skipped_why": skipped, "rows": rows });
                    outputs.push((path, serde_json::to_string_pretty(&doc).expect("plain data").into_bytes()));
                }
                if outputs.is_empty() {
                    print!("{}", sweep::to_csv(&rows));
                }
                eprintln!("bitloupe: {} recipes run, {} on the Pareto front, {skipped}", rows.len(), rows.iter().filter(|r| r.pareto).count());
                write_all_or_nothing(&outputs, &inputs(&file, &calib))
            }
            Command::Demo { out, activations } => {
                let as_npy = |t: &Tensor| npy::write_f32(t.values.as_slice().expect("row-major"), &t.shape);
                let mut outputs = vec![(out, as_npy(&bitloupe::demo::weight()))];
                if let Some(path) = activations {
                    outputs.push((path, as_npy(&bitloupe::demo::activations())));
                }
                write_all_or_nothing(&outputs, &[])
            }
        };
        done.map(|()| ExitCode::SUCCESS)
    }

    /// Exit status of a report written with some selected tensor failed (see REPORT_HELP).
    const SOME_TENSOR_FAILED: u8 = 3;

    fn report(args: ReportArgs) -> Result<ExitCode, Failure> {
        let recipe = args.recipe.recipe()?;
        let is_stdout = |path: &Option<PathBuf>| path.as_deref() == Some(Path::new("-"));
        if is_stdout(&args.json) && is_stdout(&args.csv) {
            return Err(Failure("only one of --json and --csv can go to standard output ('-')".into()));
        }
        if args.threads > 0 {
            rayon::ThreadPoolBuilder::new()
                .num_threads(usize::from(args.threads))
                .build_global()
                .map_err(|e| Failure(format!("--threads {}: {e}", args.threads)))?;
        }
        let (sources, listings): (Vec<_>, Vec<_>) =
            args.files.iter().map(|path| open(path, ReadOptions::default())).collect::<Result<Vec<_>, _>>()?.into_iter().unzip();
        let shards: Vec<Shard<std::fs::File>> = args
            .files
            .iter()
            .zip(&sources)
            .zip(listings)
            .map(|((path, source), listing)| Shard { label: path.display().to_string(), source, listing })
            .collect();
        let selection = Selection { pattern: args.pattern, include_1d: args.include_1d, available_memory: available_memory() };
        let mut bar = ReportBar::new();
        let report = checkpoint::run(&shards, &selection, &recipe, &mut |p| bar.show(p));
        bar.clear();
        let report = report?;

        let mut outputs = Vec::new();
        let mut to_stdout = String::new();
        let csv = if args.json.is_none() && args.csv.is_none() { Some(PathBuf::from("-")) } else { args.csv };
        for (path, text) in [(args.json, report.to_json() + "\n"), (csv, report.to_csv())] {
            match path {
                Some(path) if path == Path::new("-") => to_stdout = text,
                Some(path) => outputs.push((path, text.into_bytes())),
                None => {}
            }
        }
        write_all_or_nothing(&outputs, &args.files.iter().map(PathBuf::as_path).collect::<Vec<_>>())?;
        print!("{to_stdout}");
        eprint!("{}", report.summary());
        Ok(if report.totals.failed_tensors > 0 { ExitCode::from(SOME_TENSOR_FAILED) } else { ExitCode::SUCCESS })
    }

    /// The progress bar of a report: drawn on standard error only when it is a terminal, so
    /// pipes, files and tests get no control characters.
    struct ReportBar {
        bar: Option<ProgressBar>,
        tensor: (usize, String),
    }

    impl ReportBar {
        fn new() -> Self {
            ReportBar { bar: None, tensor: (usize::MAX, String::new()) }
        }

        fn show(&mut self, p: &Progress) {
            let bar = self.bar.get_or_insert_with(|| {
                let target = if std::io::stderr().is_terminal() { ProgressDrawTarget::stderr() } else { ProgressDrawTarget::hidden() };
                let bar = ProgressBar::with_draw_target(Some(p.bytes), target);
                let style = ProgressStyle::with_template("{elapsed_precise} [{bar:30}] {binary_bytes}/{binary_total_bytes} eta {eta} {msg}")
                    .expect("a fixed, valid template")
                    .progress_chars("=> ");
                bar.set_style(style);
                bar
            });
            bar.set_position(p.bytes_done);
            // A new message only when the tensor changes: set_message allocates and redraws.
            if (p.tensors_done, p.current) != (self.tensor.0, self.tensor.1.as_str()) {
                self.tensor = (p.tensors_done, p.current.to_string());
                bar.set_message(format!("tensor {}/{} {}", (p.tensors_done + 1).min(p.tensors), p.tensors, p.current.escape_debug()));
            }
        }

        fn clear(&self) {
            if let Some(bar) = &self.bar {
                bar.finish_and_clear();
            }
        }
    }

    impl ReadArgs {
        fn options(&self) -> ReadOptions {
            ReadOptions { raw16_as_bf16: self.bf16 }
        }
    }

    /// A comma-separated list of values that parse with the core's own names.
    fn list<T: std::str::FromStr<Err = bitloupe::Error>>(text: &str) -> Result<Vec<T>, Failure> {
        text.split(',').map(|item| item.parse::<T>().map_err(Failure::from)).collect()
    }

    fn is_text(path: &Path) -> bool {
        matches!(
            path.extension().and_then(|e| e.to_str()).map(str::to_ascii_lowercase).as_deref(),
            Some("txt" | "csv" | "tsv")
        )
    }

    fn open(path: &Path, options: ReadOptions) -> Result<(std::fs::File, Listing), Failure> {
        let file = std::fs::File::open(path).map_err(|e| Failure(format!("{}: cannot open: {e}", path.display())))?;
        let listing = tensor::list(&file, options).map_err(Failure::at(path))?;
        Ok((file, listing))
    }

    /// Read a tensor, first refusing it when the most demanding of `recipes` could not run on it
    /// in the memory the system can still give.
    fn load(path: &Path, name: Option<&str>, options: ReadOptions, recipes: &[Recipe]) -> Result<Tensor, Failure> {
        if is_text(path) {
            let content = std::fs::read_to_string(path).map_err(|e| Failure(format!("{}: cannot read: {e}", path.display())))?;
            let mut tensor = text::parse(&content).map_err(Failure::at(path))?;
            tensor.name_after_file(&path.to_string_lossy());
            return Ok(tensor);
        }
        let (file, listing) = open(path, options)?;
        let entry = listing.choose(name).map_err(Failure::at(path))?;
        if let Some(available) = available_memory() {
            footprint::check(&entry.shape, recipes, None, bitloupe::rows::threads(), false, available).map_err(Failure::at(path))?;
        }
        let mut tensor = tensor::read(&file, entry).map_err(Failure::at(path))?;
        tensor.name_after_file(&path.to_string_lossy());
        Ok(tensor)
    }

    /// The recipes checked again once the tensor and the calibration are read, with the
    /// calibration's tokens (GPTQ's square matrices, the output products), before the analysis
    /// allocates anything.
    fn check_room(path: &Path, tensor: &Tensor, recipes: &[Recipe], calibration: Option<&Calibration>) -> Result<(), Failure> {
        let Some(available) = available_memory() else { return Ok(()) };
        footprint::check_read(tensor, recipes, calibration, available).map_err(Failure::at(path))
    }

    /// Memory the system can still give this process (Linux's MemAvailable), when it says.
    fn available_memory() -> Option<u64> {
        let info = std::fs::read_to_string("/proc/meminfo").ok()?;
        let line = info.lines().find(|l| l.starts_with("MemAvailable:"))?;
        line.split_whitespace().nth(1)?.parse::<u64>().ok().map(|kib| kib * 1024)
    }

    fn describe(listing: &Listing) -> String {
        let mut out = format!("{} tensor(s), {:?} file\n", listing.entries.len(), listing.kind);
        let width = listing.entries.iter().map(|e| e.name.len()).max().unwrap_or(0).max(4);
        out.push_str(&format!("{:<width$}  {:<6}  {:<20}  {:>12}\n", "name", "dtype", "shape", "bytes"));
        for e in &listing.entries {
            let name = if e.name.is_empty() { "(array)" } else { &e.name };
            let dtype = match e.element {
                Some(el) => el.dtype.name().to_string(),
                None => format!("{} (unsupported)", e.dtype_label),
            };
            out.push_str(&format!("{name:<width$}  {dtype:<6}  {:<20}  {:>12}\n", format!("{:?}", e.shape), e.bytes));
        }
        out
    }

    /// The files a command reads: its tensor file and calibration file.
    fn inputs<'a>(file: &'a Path, calib: &'a CalibArgs) -> Vec<&'a Path> {
        std::iter::once(file).chain(calib.calib.as_deref()).collect()
    }

    /// Write every output to a temporary file beside its target, then rename them all, so a
    /// failure never leaves a partial output behind.
    ///
    /// A target that exists and is not a regular file (/dev/null, a terminal, a pipe) is written
    /// in place once every temporary file is complete: a rename would replace the device itself
    /// with a file (as root, /dev/null for the whole machine), and what went into a pipe cannot
    /// be taken back anyway.
    ///
    /// A symbolic link is written through: the file it names (created if missing) gets the
    /// content and the link stays. A link into /dev or /proc (/dev/stdout) is written in place,
    /// appending, like a device: it stands for a descriptor the shell opened, not for a file of
    /// the user's to replace.
    ///
    /// An output that is one of the command's `inputs` (by another name too) is refused: the
    /// rename would replace the user's source with the result.
    fn write_all_or_nothing(outputs: &[(PathBuf, Vec<u8>)], inputs: &[&Path]) -> Result<(), Failure> {
        let outputs: Vec<(PathBuf, &[u8], Option<Target>)> = outputs
            .iter()
            .map(|(path, bytes)| match link_target(path) {
                Target::File(file) => (file, bytes.as_slice(), None),
                other => (path.clone(), bytes.as_slice(), Some(other)),
            })
            .collect();
        // Checked before anything is written: two outputs on one path would share a temporary
        // file, and a directory fails only at the rename, after the outputs before it are in place.
        for (i, (path, _, _)) in outputs.iter().enumerate() {
            if std::fs::metadata(path).is_ok_and(|m| m.is_dir()) {
                return Err(Failure(format!("{}: is a directory; give a file name", path.display())));
            }
            let same_file = |input: &&&Path| matches!((std::fs::canonicalize(input), std::fs::canonicalize(path)), (Ok(a), Ok(b)) if a == b);
            if let Some(input) = inputs.iter().find(same_file) {
                return Err(Failure(format!("{}: is the input {}; give the output another name", path.display(), input.display())));
            }
            let same = |other: &PathBuf| std::path::absolute(other).ok() == std::path::absolute(path).ok();
            if outputs[..i].iter().any(|(earlier, _, _)| same(earlier)) {
                return Err(Failure(format!("{}: given for two outputs; give each its own file", path.display())));
            }
        }
        let temp_of = |path: &Path| {
            let mut name = path.file_name().unwrap_or_default().to_os_string();
            name.push(format!(".partial-{}", std::process::id()));
            path.with_file_name(name)
        };
        let in_place = |path: &Path, target: &Option<Target>| target.is_some() || std::fs::metadata(path).is_ok_and(|m| !m.is_file() && !m.is_dir());
        let (special, regular): (Vec<_>, Vec<_>) = outputs.iter().partition(|(path, _, target)| in_place(path, target));
        let cleanup = |upto: usize| {
            for (path, _, _) in &regular[..upto] {
                let _ = std::fs::remove_file(temp_of(path));
            }
        };
        let cannot_write = |path: &Path, e: std::io::Error| Failure(format!("{}: cannot write: {e}", path.display()));
        for (i, (path, bytes, _)) in regular.iter().enumerate() {
            if let Err(e) = std::fs::write(temp_of(path), bytes) {
                cleanup(i + 1);
                return Err(cannot_write(path, e));
            }
        }
        for (path, bytes, target) in &special {
            use std::io::Write;
            let written = match target {
                // Through this process's own stream, so that what it prints next follows.
                Some(Target::Stdout) => std::io::stdout().write_all(bytes).and_then(|()| std::io::stdout().flush()),
                Some(Target::Stderr) => std::io::stderr().write_all(bytes),
                // Appending, never truncating: a descriptor opened with >> keeps what it held.
                _ => std::fs::OpenOptions::new().append(true).open(path).and_then(|mut f| f.write_all(bytes)),
            };
            if let Err(e) = written {
                cleanup(regular.len());
                return Err(cannot_write(path, e));
            }
        }
        for (i, (path, _, _)) in regular.iter().enumerate() {
            if let Err(e) = std::fs::rename(temp_of(path), path) {
                for (later, _, _) in &regular[i..] {
                    let _ = std::fs::remove_file(temp_of(later));
                }
                return Err(cannot_write(path, e));
            }
        }
        Ok(())
    }

    /// Where an output path's content goes.
    enum Target {
        /// Into this file, by temporary file and rename: the path itself, or the file a
        /// symbolic link names.
        File(PathBuf),
        /// In place, appending: a path in /dev or /proc, or a link into them (a device, or a
        /// descriptor the shell opened, not a file of the user's to replace).
        Descriptor,
        /// This process's standard output (/dev/stdout and its other names).
        Stdout,
        /// This process's standard error.
        Stderr,
    }

    /// Follow `path`'s symbolic links hop by hop (a link to a missing file names the file to create).
    fn link_target(path: &Path) -> Target {
        let Ok(mut at) = std::path::absolute(path) else { return Target::File(path.to_path_buf()) };
        // Linux stops following links after 40 hops (path_resolution(7)); a loop ends here too.
        for hop in 0..=40 {
            let named = |names: [&str; 3]| names.iter().any(|n| at == Path::new(n));
            if named(["/dev/stdout", "/dev/fd/1", "/proc/self/fd/1"]) {
                return Target::Stdout;
            }
            if named(["/dev/stderr", "/dev/fd/2", "/proc/self/fd/2"]) {
                return Target::Stderr;
            }
            if at.starts_with("/dev") || at.starts_with("/proc") {
                return Target::Descriptor;
            }
            match std::fs::read_link(&at) {
                Ok(next) => at = at.parent().map_or(next.clone(), |dir| dir.join(&next)),
                // Not a link: messages keep the path as the user gave it.
                Err(_) if hop == 0 => return Target::File(path.to_path_buf()),
                Err(_) => return Target::File(at),
            }
        }
        Target::File(path.to_path_buf())
    }
}
