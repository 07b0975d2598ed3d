//! The WebAssembly boundary: thin wrappers over the core for the page's Worker.
//!
//! A tensor stays in wasm memory behind an opaque [`TensorHandle`]; JavaScript receives small
//! results as plain objects (serde-wasm-bindgen) and bulk figures as `Float32Array`s (one copy
//! out of wasm memory). Every fallible call returns `Result<_, JsError>`; a panic hook reports
//! anything unexpected to the console instead of an opaque "unreachable".

use crate::analysis::{analyze_with, Analysis};
use crate::calib::{CalibKind, Calibration};
use crate::methods::smooth::{self, ActQuant};
use crate::metrics::Histogram;
use crate::error::Error;
use crate::recipe::Recipe;
use crate::report::Report;
use crate::sweep::Skipped;
use crate::tensor::{self, ByteSource, ReadOptions, Tensor, ValueScan};
use serde::{Deserialize, Serialize};
use std::alloc::{GlobalAlloc, Layout, System};
use std::rc::Rc;
use std::sync::atomic::{AtomicUsize, Ordering};
use wasm_bindgen::prelude::*;

fn js_error(err: Error) -> JsError {
    JsError::new(&err.to_string())
}

fn to_js<T: Serialize + ?Sized>(value: &T) -> Result<JsValue, JsError> {
    value
        .serialize(&serde_wasm_bindgen::Serializer::json_compatible())
        .map_err(|e| JsError::new(&e.to_string()))
}

thread_local! {
    static LAST_PANIC: std::cell::RefCell<Option<String>> = const { std::cell::RefCell::new(None) };
}

/// The wasm build's allocator: the standard one, remembering the size of the last request it
/// could not meet. Rust aborts after such a failure, and in WebAssembly an abort is a bare trap
/// (there is no error stream for the usual message), so [`take_panic_message`] gives that message
/// instead and the page can say that memory ran out. It also counts the bytes it has given out
/// and not taken back, which [`check_room`] weighs a run's memory estimate against.
struct RememberingFailures;

/// Bytes of the last allocation that failed, 0 if none since the last [`take_panic_message`]
/// (shared by every thread: a pool worker's failure is read from the compute worker too).
static FAILED_ALLOCATION: AtomicUsize = AtomicUsize::new(0);

/// Bytes allocated and not yet freed, by every thread: what an analysis's memory estimate is
/// weighed against ([`check_room`]).
static LIVE_BYTES: AtomicUsize = AtomicUsize::new(0);

impl RememberingFailures {
    fn noted(p: *mut u8, bytes: usize) -> *mut u8 {
        match p.is_null() {
            true => FAILED_ALLOCATION.store(bytes, Ordering::Relaxed),
            false => _ = LIVE_BYTES.fetch_add(bytes, Ordering::Relaxed),
        }
        p
    }
}

// SAFETY: every call goes to the standard allocator unchanged; the results are only noted.
unsafe impl GlobalAlloc for RememberingFailures {
    unsafe fn alloc(&self, layout: Layout) -> *mut u8 {
        Self::noted(System.alloc(layout), layout.size())
    }
    unsafe fn alloc_zeroed(&self, layout: Layout) -> *mut u8 {
        Self::noted(System.alloc_zeroed(layout), layout.size())
    }
    unsafe fn dealloc(&self, ptr: *mut u8, layout: Layout) {
        System.dealloc(ptr, layout);
        LIVE_BYTES.fetch_sub(layout.size(), Ordering::Relaxed);
    }
    unsafe fn realloc(&self, ptr: *mut u8, layout: Layout, new_size: usize) -> *mut u8 {
        let p = Self::noted(System.realloc(ptr, layout, new_size), new_size);
        if !p.is_null() {
            LIVE_BYTES.fetch_sub(layout.size(), Ordering::Relaxed);
        }
        p
    }
}

/// The most memory a WebAssembly page can have: wasm32 addresses 4 GiB, and the threaded build
/// declares that as its maximum.
const MEMORY_CEILING: u64 = 1 << 32;

/// Bytes the WebAssembly memory can still give.
fn memory_left() -> u64 {
    MEMORY_CEILING.saturating_sub(LIVE_BYTES.load(Ordering::Relaxed) as u64)
}

/// Refuse to run `recipes` on `tensor` when the largest of their memory estimates
/// ([`crate::footprint`]) is more than the WebAssembly memory has left, before anything is
/// allocated: an allocation that fails ends the instance, and the page must then restart its
/// worker and read the tensor again.
fn check_room(tensor: &Tensor, recipes: &[Recipe], calib: Option<&Calibration>) -> Result<(), JsError> {
    crate::footprint::check_read(tensor, recipes, calib, memory_left())
        .map_err(|e| JsError::new(&format!("{e} of the page's 4 GiB; the command-line tool has no such limit")))
}

#[global_allocator]
static ALLOCATOR: RememberingFailures = RememberingFailures;

/// Install the panic hook when the module starts: it logs to the console and keeps the message
/// so the worker can show it on the page.
#[wasm_bindgen(start)]
pub fn start() {
    std::panic::set_hook(Box::new(|info| {
        console_error_panic_hook::hook(info);
        LAST_PANIC.with(|last| *last.borrow_mut() = Some(info.to_string()));
    }));
}

/// Handed from [`build_pool`] to the waiting pool workers ([`pool_thread`]).
#[cfg(target_feature = "atomics")]
type PoolQueue = (std::sync::Mutex<std::sync::mpsc::Sender<rayon::ThreadBuilder>>, std::sync::Mutex<std::sync::mpsc::Receiver<rayon::ThreadBuilder>>);

#[cfg(target_feature = "atomics")]
fn pool_queue() -> &'static PoolQueue {
    static QUEUE: std::sync::OnceLock<PoolQueue> = std::sync::OnceLock::new();
    QUEUE.get_or_init(|| {
        let (send, receive) = std::sync::mpsc::channel();
        (std::sync::Mutex::new(send), std::sync::Mutex::new(receive))
    })
}

/// Threaded build only: make rayon's global pool out of `threads` web workers that are already
/// running [`pool_thread`] on this module and memory. The row blocks of every analysis then
/// spread over them (see `rows`), with the same results as one thread.
#[cfg(target_feature = "atomics")]
#[wasm_bindgen(js_name = buildPool)]
pub fn build_pool(threads: usize) -> Result<(), JsError> {
    rayon::ThreadPoolBuilder::new()
        .num_threads(threads)
        .spawn_handler(|thread| {
            pool_queue().0.lock().map_err(|_| std::io::Error::other("pool queue poisoned"))?.send(thread).map_err(|_| std::io::Error::other("pool queue closed"))
        })
        .build_global()
        .map_err(|e| JsError::new(&e.to_string()))
}

/// Threaded build only: a pool worker's whole life — wait for a place in the pool, then run
/// rayon's work loop (it never returns while the pool lives).
#[cfg(target_feature = "atomics")]
#[wasm_bindgen(js_name = poolThread)]
pub fn pool_thread() -> Result<(), JsError> {
    let thread = pool_queue().1.lock().map_err(|_| JsError::new("pool queue poisoned"))?.recv().map_err(|e| JsError::new(&e.to_string()))?;
    thread.run();
    Ok(())
}

/// The message of the last panic on this thread, else of the last allocation that failed on any
/// thread (in the words of Rust's own report), if either happened since the last call.
#[wasm_bindgen(js_name = takePanicMessage)]
pub fn take_panic_message() -> Option<String> {
    let failed = FAILED_ALLOCATION.swap(0, Ordering::Relaxed);
    let panic = LAST_PANIC.with(|last| last.borrow_mut().take());
    panic.or_else(|| (failed > 0).then(|| format!("memory allocation of {failed} bytes failed")))
}

/// The default recipe and the allowed ranges: the page builds its controls from these.
#[wasm_bindgen(js_name = recipeDefaults)]
pub fn recipe_defaults() -> Result<JsValue, JsError> {
    #[derive(Serialize)]
    struct Defaults {
        recipe: Recipe,
        bits: [u8; 2],
        group_sizes: [usize; 2],
        max_elements: usize,
    }
    to_js(&Defaults {
        recipe: Recipe::default(),
        bits: [*crate::recipe::BITS.start(), *crate::recipe::BITS.end()],
        group_sizes: [*crate::recipe::GROUP_SIZES.start(), *crate::recipe::GROUP_SIZES.end()],
        max_elements: tensor::MAX_ELEMENTS,
    })
}

/// A finished sweep's `rows` with the front marked again against `by` ("sqnr", "mse" or
/// "output"): the page's error axis changed, and the figures are all in the rows already.
#[wasm_bindgen(js_name = sweepFront)]
pub fn sweep_front(rows: JsValue, by: &str) -> Result<JsValue, JsError> {
    let mut rows: Vec<crate::sweep::SweepRow> = from_json_value(&rows, "sweep rows")?;
    crate::sweep::mark_front(&mut rows, by.parse().map_err(js_error)?);
    to_js(&rows)
}

/// The recipes of a sweep spec `{formats, bits, groups, methods, scale_dtypes}`:
/// `{recipes, skipped}`, `skipped` the combinations left out, `[{why, count}]` (pass it on to
/// `sweep`).
#[wasm_bindgen(js_name = sweepRecipes)]
pub fn sweep_recipes(spec: JsValue) -> Result<JsValue, JsError> {
    let spec: crate::sweep::SweepSpec = from_json_value(&spec, "sweep")?;
    let (recipes, skipped) = crate::sweep::recipes(&spec).map_err(js_error)?;
    #[derive(Serialize)]
    struct Plan {
        recipes: Vec<Recipe>,
        skipped: Skipped,
    }
    to_js(&Plan { recipes, skipped })
}

/// The size of a model under `recipe`: from the headers of the `.safetensors` shards in `files`
/// (the tensors the command's checkpoint report would quantize: names matching `pattern`,
/// floating-point, 1-D ones only with `include_1d`), or, with no files, from `params` weights
/// costed as 4096-column rows of 16-bit sources.
#[wasm_bindgen(js_name = modelSize)]
pub fn model_size(files: js_sys::Array, pattern: &str, include_1d: bool, params: f64, recipe: JsValue) -> Result<JsValue, JsError> {
    let recipe = parse_recipe(recipe)?;
    recipe.validate().map_err(js_error)?;
    let mut entries = Vec::new();
    for file in files.iter() {
        let blob: web_sys::Blob = file.dyn_into().map_err(|_| JsError::new("not a file"))?;
        let src = BlobSource::new(blob)?;
        entries.extend(tensor::list(&src, ReadOptions::default()).map_err(js_error)?.entries);
    }
    if entries.is_empty() {
        return to_js(&crate::sizing::model_size_from_count(params.max(0.0) as u64, &recipe));
    }
    let selection = crate::checkpoint::Selection { pattern: pattern.into(), include_1d, available_memory: None };
    to_js(&crate::sizing::model_size(&entries, &selection, &recipe))
}

/// The recipe a page link holds (its JSON text, missing fields at their defaults), checked as
/// an analysis would check it, so the page never shows a recipe it cannot run.
#[wasm_bindgen(js_name = recipeFromLink)]
pub fn recipe_from_link(text: &str) -> Result<JsValue, JsError> {
    let recipe = Recipe::from_json(text).map_err(js_error)?;
    recipe.validate().map_err(js_error)?;
    to_js(&recipe)
}

/// The default recipe for a format (see `Recipe::for_format`).
#[wasm_bindgen(js_name = recipeForFormat)]
pub fn recipe_for_format(name: &str) -> Result<JsValue, JsError> {
    let format: crate::formats::Format = name.parse().map_err(js_error)?;
    to_js(&Recipe::for_format(format))
}

/// A browser `Blob` (or `File`) read synchronously range by range; only Workers have
/// `FileReaderSync`, which is where the core runs. A browser's ranged reads cost per range (in
/// Chromium's worker a 112 MiB file took 290–460 ms in ranges of 2 MiB, 126–160 ms in ranges of
/// 32 MiB), so a read of tensor data fetches a range of [`BLOB_RANGE_BYTES`] and serves the reads
/// that follow from it. The range is a JavaScript buffer, outside the wasm memory, so it adds
/// nothing to the memory's peak: 32 MiB reads into the wasm memory itself left a hole there that
/// the analysis's output could not use (peak 2.52× the tensor's f32 size against 2.19×).
struct BlobSource {
    blob: web_sys::Blob,
    reader: web_sys::FileReaderSync,
    /// The last range fetched ahead: its first byte's offset and its bytes.
    ahead: std::cell::RefCell<Option<(u64, js_sys::Uint8Array)>>,
}

/// Bytes fetched at once for reads of tensor data.
const BLOB_RANGE_BYTES: u64 = 32 << 20;

/// Reads at least this long are of tensor data, which the core reads in order: they fetch ahead.
/// Shorter ones (headers) fetch only what they ask, so listing a file reads only its header.
const READ_AHEAD_FROM: usize = 1 << 20;

impl BlobSource {
    fn new(blob: web_sys::Blob) -> Result<Self, JsError> {
        let reader = web_sys::FileReaderSync::new()
            .map_err(|_| JsError::new("files can only be read inside the page's worker"))?;
        Ok(BlobSource { blob, reader, ahead: std::cell::RefCell::new(None) })
    }

    /// The bytes of [start, end), which the caller has checked lie within the blob.
    fn fetch(&self, start: u64, end: u64) -> crate::Result<js_sys::Uint8Array> {
        let io = |what: &str| Error::Io { message: what.to_string() };
        let slice = self.blob.slice_with_f64_and_f64(start as f64, end as f64).map_err(|_| io("the file could not be sliced"))?;
        let array = self.reader.read_as_array_buffer(&slice).map_err(|_| io("the browser could not read the file"))?;
        let bytes = js_sys::Uint8Array::new(&array);
        if u64::from(bytes.length()) != end - start {
            return Err(io("the file changed or ended while it was being read"));
        }
        Ok(bytes)
    }
}

impl ByteSource for BlobSource {
    fn len(&self) -> u64 {
        self.blob.size() as u64
    }
    fn read_at(&self, offset: u64, buf: &mut [u8]) -> crate::Result<()> {
        let end = offset + buf.len() as u64;
        if let Some((start, bytes)) = &*self.ahead.borrow() {
            if offset >= *start && end <= start + u64::from(bytes.length()) {
                bytes.subarray((offset - start) as u32, (end - start) as u32).copy_to(buf);
                return Ok(());
            }
        }
        let fetch_end = if buf.len() >= READ_AHEAD_FROM { end.max((offset + BLOB_RANGE_BYTES).min(self.len())) } else { end };
        let bytes = self.fetch(offset, fetch_end)?;
        bytes.subarray(0, buf.len() as u32).copy_to(buf);
        *self.ahead.borrow_mut() = (fetch_end > end).then_some((offset, bytes));
        Ok(())
    }
}

/// A recipe from a plain object (any of its fields; the rest take defaults). Through JSON text
/// rather than serde-wasm-bindgen, which skips unknown keys: a misspelt field must be an error,
/// not a silent default.
fn parse_recipe(recipe: JsValue) -> Result<Recipe, JsError> {
    if recipe.is_undefined() || recipe.is_null() {
        return Ok(Recipe::default());
    }
    let text = js_sys::JSON::stringify(&recipe).ok().and_then(|s| s.as_string()).unwrap_or_default();
    Recipe::from_json(&text).map_err(js_error)
}

/// A plain JavaScript value read as `T` through its JSON text; `what` names it in a refusal.
fn from_json_value<T: serde::de::DeserializeOwned>(value: &JsValue, what: &str) -> Result<T, JsError> {
    let text = js_sys::JSON::stringify(value).ok().and_then(|s| s.as_string()).unwrap_or_default();
    serde_json::from_str(&text).map_err(|e| JsError::new(&format!("invalid {what}: {e}")))
}

/// A progress callback that forwards to a JS function, when one is given.
fn reporter(progress: Option<js_sys::Function>) -> impl FnMut(usize, usize) {
    move |done: usize, total: usize| {
        if let Some(f) = &progress {
            let _ = f.call2(&JsValue::NULL, &JsValue::from(done as f64), &JsValue::from(total as f64));
        }
    }
}

fn options(raw16_as_bf16: bool) -> ReadOptions {
    ReadOptions { raw16_as_bf16 }
}

/// List the tensors of a `.npy` or `.safetensors` file from its header alone.
#[wasm_bindgen(js_name = listFile)]
pub fn list_file(file: web_sys::Blob, raw16_as_bf16: bool) -> Result<JsValue, JsError> {
    let src = BlobSource::new(file)?;
    to_js(&tensor::list(&src, options(raw16_as_bf16)).map_err(js_error)?)
}

/// Read one tensor of a file (its own byte range only); `name` may be omitted for one-tensor files.
/// An array with no name of its own (`.npy`) is named after the file.
#[wasm_bindgen(js_name = openFile)]
pub fn open_file(file: web_sys::Blob, name: Option<String>, raw16_as_bf16: bool) -> Result<TensorHandle, JsError> {
    // A dropped or chosen file is a `File`, whose name names an array that has none of its own.
    let file_name = js_sys::Reflect::get(&file, &JsValue::from_str("name")).ok().and_then(|n| n.as_string());
    let src = BlobSource::new(file)?;
    let mut tensor = open_source(&src, name, raw16_as_bf16)?;
    if let Some(file_name) = file_name {
        tensor.name_after_file(&file_name);
    }
    Ok(TensorHandle::new(tensor))
}

/// Whether a tensor of `shape`, read and analysed under `recipe`, fits beside everything the page
/// holds now ([`crate::footprint::check`]): the worker lets the tensor on screen go before it reads
/// one that does not. A shape that cannot be read at all, or a recipe that is not valid, is left
/// to the reading or the run, which says what is wrong.
#[wasm_bindgen(js_name = fitsBesideHeld)]
pub fn fits_beside_held(shape: Vec<usize>, recipe: JsValue) -> bool {
    let Ok(recipe) = parse_recipe(recipe) else { return true };
    if tensor::element_count(&shape).is_err() || tensor::view_2d(&shape).is_err() {
        return true;
    }
    crate::footprint::check(&shape, &[recipe], None, crate::rows::threads(), false, memory_left()).is_ok()
}

/// Bytes of WebAssembly memory this instance holds. Its memory only grows, so this is also the
/// peak of everything it has done (the benchmark reports it).
#[wasm_bindgen(js_name = memoryBytes)]
pub fn memory_bytes() -> f64 {
    (core::arch::wasm32::memory_size(0) * 65536) as f64
}

/// Read one tensor from bytes already in memory.
#[wasm_bindgen(js_name = openBytes)]
pub fn open_bytes(bytes: &[u8], name: Option<String>, raw16_as_bf16: bool) -> Result<TensorHandle, JsError> {
    open_source(bytes, name, raw16_as_bf16).map(TensorHandle::new)
}

fn open_source<S: ByteSource + ?Sized>(src: &S, name: Option<String>, raw16_as_bf16: bool) -> Result<Tensor, JsError> {
    let listing = tensor::list(src, options(raw16_as_bf16)).map_err(js_error)?;
    let entry = listing.choose(name.as_deref()).map_err(js_error)?;
    tensor::read(src, entry).map_err(js_error)
}

/// Calibration data checked against a weight's input width.
#[wasm_bindgen]
pub struct CalibrationHandle {
    calib: Calibration,
    name: String,
    shape: Vec<usize>,
}

fn calibration(tensor: Tensor, kind: &str, cols: usize) -> Result<CalibrationHandle, JsError> {
    let kind: CalibKind = kind.parse().map_err(js_error)?;
    let calib = Calibration::from_tensor(&tensor, kind, cols).map_err(js_error)?;
    Ok(CalibrationHandle { calib, name: tensor.name, shape: tensor.shape })
}

/// Calibration from a file: `kind` is "sample", "maxabs" or "meanabs"; `cols` is the weight's
/// input width.
#[wasm_bindgen(js_name = calibrationFromFile)]
pub fn calibration_from_file(file: web_sys::Blob, name: Option<String>, kind: &str, cols: usize, raw16_as_bf16: bool) -> Result<CalibrationHandle, JsError> {
    let src = BlobSource::new(file)?;
    calibration(open_source(&src, name, raw16_as_bf16)?, kind, cols)
}

/// Calibration from bytes already in memory.
#[wasm_bindgen(js_name = calibrationFromBytes)]
pub fn calibration_from_bytes(bytes: &[u8], name: Option<String>, kind: &str, cols: usize) -> Result<CalibrationHandle, JsError> {
    calibration(open_source(bytes, name, false)?, kind, cols)
}

/// The demo activation sample (matched to the demo weight).
#[wasm_bindgen(js_name = demoCalibration)]
pub fn demo_calibration(cols: usize) -> Result<CalibrationHandle, JsError> {
    calibration(crate::demo::activations(), "sample", cols)
}

#[wasm_bindgen]
impl CalibrationHandle {
    /// Name, shape, kind, input width, and whether it is a full sample.
    pub fn info(&self) -> Result<JsValue, JsError> {
        #[derive(Serialize)]
        struct Info<'a> {
            name: &'a str,
            shape: &'a [usize],
            kind: CalibKind,
            cols: usize,
            tokens: Option<usize>,
        }
        let c = &self.calib;
        to_js(&Info { name: &self.name, shape: &self.shape, kind: c.kind, cols: c.cols(), tokens: c.sample.as_ref().map(|x| x.nrows()) })
    }

    /// max |x_j| per input column.
    #[wasm_bindgen(js_name = maxAbs)]
    pub fn max_abs(&self) -> js_sys::Float32Array {
        js_sys::Float32Array::from(self.calib.max_abs.as_slice())
    }
}

/// Parse a pasted matrix.
#[wasm_bindgen(js_name = parseText)]
pub fn parse_text(text: &str) -> Result<TensorHandle, JsError> {
    let mut tensor = tensor::text::parse(text).map_err(js_error)?;
    tensor.name = tensor::text::PASTED_NAME.to_string();
    Ok(TensorHandle::new(tensor))
}

/// Rows and columns of the weight [`warm_up`] analyses: a few hundred thousand values.
const WARM_UP_SHAPE: (usize, usize) = (256, 1024);
/// How often [`warm_up`] runs the default recipe.
const WARM_UP_RUNS: usize = 4;

/// Run the default recipe a few times on a small seeded weight and drop the results. WebAssembly
/// engines first run a function as quickly compiled baseline code and swap in optimised code for
/// its next call once it has proved hot (V8's dynamic tiering); the page calls this right after
/// start, so that the user's first analysis already runs the optimised kernels.
#[wasm_bindgen(js_name = warmUp)]
pub fn warm_up() -> Result<(), JsError> {
    let mut rng = crate::demo::Rng::new(1);
    let values = ndarray::Array2::from_shape_fn(WARM_UP_SHAPE, |_| (0.02 * rng.normal()) as f32);
    let weight = Tensor::from_values("warm-up", tensor::DType::F32, values);
    for _ in 0..WARM_UP_RUNS {
        analyze_with(&weight, &Recipe::default(), None, &mut |_, _| {}).map_err(js_error)?;
    }
    Ok(())
}

/// The built-in demo weight.
#[wasm_bindgen(js_name = demoWeight)]
pub fn demo_weight() -> TensorHandle {
    TensorHandle::new(crate::demo::weight())
}

/// A tensor held in wasm memory.
#[wasm_bindgen]
pub struct TensorHandle {
    /// Shared with the results taken from it: a plain recipe's reconstruction is made again from
    /// the tensor when it is exported.
    tensor: Rc<Tensor>,
    /// Its range and non-finite values, found once: the tensor never changes.
    scan: ValueScan,
}

impl TensorHandle {
    fn new(tensor: Tensor) -> Self {
        let scan = tensor.scan();
        TensorHandle { tensor: Rc::new(tensor), scan }
    }
}

#[wasm_bindgen]
impl TensorHandle {
    /// Name, dtype, shape, 2-D view, value range and non-finite counts.
    pub fn info(&self) -> Result<JsValue, JsError> {
        #[derive(Serialize)]
        struct Info<'a> {
            name: &'a str,
            dtype: &'static str,
            shape: &'a [usize],
            rows: usize,
            cols: usize,
            elements: usize,
            min: Option<f32>,
            max: Option<f32>,
            nan: usize,
            inf: usize,
            first_non_finite: Option<(usize, usize)>,
        }
        let t = &self.tensor;
        let (range, nf) = (self.scan.range, self.scan.non_finite);
        to_js(&Info {
            name: &t.name,
            dtype: t.dtype.name(),
            shape: &t.shape,
            rows: t.rows(),
            cols: t.cols(),
            elements: t.values.len(),
            min: range.map(|r| r.0),
            max: range.map(|r| r.1),
            nan: nf.nan,
            inf: nf.inf,
            first_non_finite: nf.first,
        })
    }

    /// An error naming how many NaN and infinite values there are and where the first is, when
    /// there is any (no analysis can be made of such a tensor).
    #[wasm_bindgen(js_name = checkFinite)]
    pub fn check_finite(&self) -> Result<(), JsError> {
        self.scan.non_finite.check().map_err(js_error)
    }

    /// Run a recipe (a plain object with any of the recipe's fields; the rest take defaults),
    /// with optional calibration, calling `progress(done, total)` now and then when it is given.
    pub fn analyze(
        &self,
        recipe: JsValue,
        progress: Option<js_sys::Function>,
        calibration: Option<CalibrationHandle>,
    ) -> Result<AnalysisHandle, JsError> {
        self.analyze_ref(recipe, progress, calibration.as_ref())
    }

    /// `analyze` without giving up the calibration handle.
    #[wasm_bindgen(js_name = analyzeWith)]
    pub fn analyze_with_calibration(
        &self,
        recipe: JsValue,
        progress: Option<js_sys::Function>,
        calibration: &CalibrationHandle,
    ) -> Result<AnalysisHandle, JsError> {
        self.analyze_ref(recipe, progress, Some(calibration))
    }

    /// The W8A8 smoothing study at strength `alpha`, activations per "tensor" or "token".
    #[wasm_bindgen(js_name = smoothingStudy)]
    pub fn smoothing_study(
        &self,
        calibration: &CalibrationHandle,
        alpha: f32,
        act: &str,
        progress: Option<js_sys::Function>,
    ) -> Result<JsValue, JsError> {
        let act: ActQuant = act.parse().map_err(js_error)?;
        let mut report = reporter(progress);
        let study = smooth::study(self.tensor.values.view(), &calibration.calib, alpha, act, &mut report).map_err(js_error)?;
        to_js(&study)
    }

    /// Per-column max |w'_j| and max |x'_j| after smoothing at `alpha` (cheap, for a live
    /// slider): `{weight, act}`.
    #[wasm_bindgen(js_name = smoothedColumns)]
    pub fn smoothed_columns(&self, calibration: &CalibrationHandle, alpha: f32) -> Result<JsValue, JsError> {
        #[derive(Serialize)]
        struct Columns {
            weight: Vec<f32>,
            act: Vec<f32>,
        }
        let w_max = smooth::column_max(self.tensor.values.view());
        let s = smooth::factors(self.tensor.values.view(), &calibration.calib, alpha);
        to_js(&Columns {
            weight: w_max.iter().zip(&s).map(|(m, f)| m * f).collect(),
            act: calibration.calib.max_abs.iter().zip(&s).map(|(m, f)| m / f).collect(),
        })
    }

    fn analyze_ref(
        &self,
        recipe: JsValue,
        progress: Option<js_sys::Function>,
        calibration: Option<&CalibrationHandle>,
    ) -> Result<AnalysisHandle, JsError> {
        let recipe = parse_recipe(recipe)?;
        let mut report = reporter(progress);
        let calib = calibration.map(|c| &c.calib);
        check_room(&self.tensor, &[recipe], calib)?;
        let analysis = analyze_with(&self.tensor, &recipe, calib, &mut report).map_err(js_error)?;
        let summary = to_js(&Report::new(&self.tensor, &analysis).without_group_lists())?;
        Ok(AnalysisHandle { analysis, summary, tensor: Rc::clone(&self.tensor) })
    }

    /// Run a sweep's plan (`sweepRecipes`: its recipes and the combinations it skipped) and mark
    /// the front against `by` ("sqnr", "mse" or "output"): `{rows, skipped}`, `skipped` saying in
    /// words what was not run and why, the plan's combinations with the recipes that failed on
    /// this tensor or could not fit the memory left; `progress(done, total, row)` after each
    /// recipe run, `row` undefined for one that failed.
    pub fn sweep(&self, plan: JsValue, by: &str, progress: js_sys::Function) -> Result<JsValue, JsError> {
        self.sweep_ref(plan, by, progress, None)
    }

    /// `sweep` with calibration.
    #[wasm_bindgen(js_name = sweepWith)]
    pub fn sweep_with(&self, plan: JsValue, by: &str, progress: js_sys::Function, calibration: &CalibrationHandle) -> Result<JsValue, JsError> {
        self.sweep_ref(plan, by, progress, Some(calibration))
    }

    fn sweep_ref(&self, plan: JsValue, by: &str, progress: js_sys::Function, calibration: Option<&CalibrationHandle>) -> Result<JsValue, JsError> {
        #[derive(Deserialize)]
        struct Plan {
            recipes: Vec<Recipe>,
            skipped: Skipped,
        }
        #[derive(Serialize)]
        struct Swept {
            rows: Vec<crate::sweep::SweepRow>,
            skipped: String,
        }
        let Plan { recipes, mut skipped } = from_json_value(&plan, "sweep plan")?;
        let by = by.parse().map_err(js_error)?;
        let calib = calibration.map(|c| &c.calib);
        let mut report = |done: usize, total: usize, row: Option<&crate::sweep::SweepRow>| {
            let row = row.and_then(|r| to_js(r).ok()).unwrap_or(JsValue::UNDEFINED);
            let _ = progress.call3(&JsValue::NULL, &JsValue::from(done as f64), &JsValue::from(total as f64), &row);
        };
        // A recipe that cannot fit the memory left is skipped and counted like one the tensor
        // cannot take; only when none fits is the sweep refused, naming the most demanding.
        let (fitting, too_large): (Vec<Recipe>, Vec<Recipe>) =
            recipes.into_iter().partition(|recipe| check_room(&self.tensor, std::slice::from_ref(recipe), calib).is_ok());
        if fitting.is_empty() && !too_large.is_empty() {
            check_room(&self.tensor, &too_large, calib)?;
        }
        for recipe in &too_large {
            let detail = format!("{} needs more memory than the page has left (the command-line tool has no such limit)", recipe.method.name());
            skipped.add(&Error::BadRecipe { detail });
        }
        let (rows, failed) = crate::sweep::run(&self.tensor, calib, &fitting, by, &mut report).map_err(js_error)?;
        to_js(&Swept { rows, skipped: skipped.merged(failed).to_string() })
    }
}

/// The result of one recipe on one tensor.
#[wasm_bindgen]
pub struct AnalysisHandle {
    analysis: Analysis,
    summary: JsValue,
    /// The tensor it was taken from.
    tensor: Rc<Tensor>,
}

#[wasm_bindgen]
impl AnalysisHandle {
    /// Histogram of the values of group `index` of the tensor analysed, with the grid points of
    /// that group: `{lo, hi, counts, grid}`.
    #[wasm_bindgen(js_name = groupHistogram)]
    pub fn group_histogram(&self, index: usize, bins: usize) -> Result<JsValue, JsError> {
        #[derive(Serialize)]
        struct GroupHistogram {
            scaled: bool,
            histogram: Histogram,
            grid: Vec<f32>,
            rows: [usize; 2],
            cols: [usize; 2],
        }
        let (rows, cols) = self.analysis.group_span(index).ok_or_else(|| JsError::new("no such group"))?;
        let mut values = self.tensor.values.slice(ndarray::s![rows.clone(), cols.clone()]).to_owned();
        // With column factors the grid applies to W·diag(s); show the values it saw.
        if let Some(s) = &self.analysis.column_factors {
            for mut row in values.rows_mut() {
                for (v, f) in row.iter_mut().zip(&s[cols.clone()]) {
                    *v *= f;
                }
            }
        }
        to_js(&GroupHistogram {
            scaled: self.analysis.column_factors.is_some(),
            histogram: Histogram::of(values.iter(), bins),
            grid: self.analysis.grid_points(index),
            rows: [rows.start, rows.end],
            cols: [cols.start, cols.end],
        })
    }

    /// Headline figures, bit budget and outlier columns (the JSON report without group lists).
    pub fn summary(&self) -> JsValue {
        self.summary.clone()
    }

    fn report(&self) -> Report<'_> {
        Report::new(&self.tensor, &self.analysis)
    }

    /// The complete JSON report.
    #[wasm_bindgen(js_name = reportJson)]
    pub fn report_json(&self) -> String {
        self.report().to_json()
    }

    /// The Markdown summary.
    pub fn markdown(&self) -> String {
        self.report().to_markdown()
    }

    /// Per-group figures as CSV.
    #[wasm_bindgen(js_name = groupsCsv)]
    pub fn groups_csv(&self) -> String {
        self.report().groups_csv()
    }

    /// The packed `.safetensors` file of this result.
    pub fn packed(&self) -> Result<Vec<u8>, JsError> {
        self.check_export()?;
        crate::packed::pack(&self.analysis, &self.tensor).map_err(js_error)
    }

    /// Refuse an export that cannot fit what the page's memory has left, before anything is
    /// allocated for it ([`crate::footprint::export_bytes`]): a failed allocation would end the
    /// instance, and the result on screen with it.
    fn check_export(&self) -> Result<(), JsError> {
        crate::footprint::check_export(&self.analysis, 0, memory_left()).map_err(|e| {
            JsError::new(&format!("{e} of the page's 4 GiB; the command-line tool writes it (bitloupe quantize FILE --out … or --packed …)"))
        })
    }

    /// MSE of every group, row-major over [groups.rows × groups.per_row].
    #[wasm_bindgen(js_name = groupMse)]
    pub fn group_mse(&self) -> js_sys::Float32Array {
        js_sys::Float32Array::from(self.analysis.groups.mse.as_slice())
    }

    /// Relative error of every group.
    #[wasm_bindgen(js_name = groupRelErr)]
    pub fn group_rel_err(&self) -> js_sys::Float32Array {
        js_sys::Float32Array::from(self.analysis.groups.rel_err.as_slice())
    }

    /// Largest absolute error of every group.
    #[wasm_bindgen(js_name = groupMaxErr)]
    pub fn group_max_err(&self) -> js_sys::Float32Array {
        js_sys::Float32Array::from(self.analysis.groups.max_abs_err.as_slice())
    }

    /// Output error of every output row (empty without calibration).
    #[wasm_bindgen(js_name = outputRowErr)]
    pub fn output_row_err(&self) -> js_sys::Float32Array {
        let rows = self.analysis.output.as_ref().map_or(&[][..], |o| o.per_row.as_slice());
        js_sys::Float32Array::from(rows)
    }

    /// max |w| of every input column.
    #[wasm_bindgen(js_name = columnMaxAbs)]
    pub fn column_max_abs(&self) -> js_sys::Float32Array {
        js_sys::Float32Array::from(self.analysis.columns.max_abs.as_slice())
    }

    /// RMS of the error of every input column.
    #[wasm_bindgen(js_name = columnErrRms)]
    pub fn column_err_rms(&self) -> js_sys::Float32Array {
        js_sys::Float32Array::from(self.analysis.columns.err_rms.as_slice())
    }

    /// Outlier score of every input column.
    #[wasm_bindgen(js_name = columnOutlierScore)]
    pub fn column_outlier_score(&self) -> js_sys::Float32Array {
        js_sys::Float32Array::from(self.analysis.columns.outlier_score.as_slice())
    }

    /// The dequantized tensor as a float32 `.npy` file in the source's stored shape.
    #[wasm_bindgen(js_name = dequantizedNpy)]
    pub fn dequantized_npy(&self) -> Result<Vec<u8>, JsError> {
        self.check_export()?;
        let values = self.analysis.dequantized(&self.tensor).map_err(js_error)?;
        Ok(crate::tensor::npy::write_f32(values.as_slice().expect("row-major"), &self.tensor.shape))
    }
}
