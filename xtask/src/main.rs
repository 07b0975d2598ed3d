//! bitloupe's build helper, run as `cargo xtask <command>`.
//!
//! * `serve [--port N]`: install what is missing, build the page into `dist/`, serve it on
//!   127.0.0.1 (the main command of the README);
//! * `build`: the same without serving;
//! * `test`: install what is missing and run every test: native, a short pass of every fuzz
//!   target, wasm under Node, and the browser tests in headless Chromium;
//! * `bench`: the native benchmarks.
//!
//! Every tool the project needs is installed here when missing, so a fresh machine needs only
//! cargo to start.

use std::path::{Path, PathBuf};
use std::process::Command;

type Result<T = ()> = std::result::Result<T, String>;

fn main() {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let result = match args.first().map(String::as_str) {
        Some("serve") => serve(&args[1..]),
        Some("build") => build().map(|_| ()),
        Some("test") => test(),
        Some("bench") => bench(),
        _ => Err("usage: cargo xtask serve [--port N] | build | test | bench".into()),
    };
    if let Err(message) = result {
        eprintln!("xtask: {message}");
        std::process::exit(1);
    }
}

fn root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).parent().expect("xtask sits in the workspace").to_path_buf()
}

fn run(cmd: &mut Command) -> Result {
    let shown = format!("{cmd:?}");
    let status = cmd.status().map_err(|e| format!("could not start {shown}: {e}"))?;
    if status.success() { Ok(()) } else { Err(format!("{shown} failed ({status})")) }
}

fn output(cmd: &mut Command) -> Option<String> {
    cmd.output().ok().filter(|o| o.status.success()).map(|o| String::from_utf8_lossy(&o.stdout).into_owned())
}

fn step(what: &str) {
    eprintln!("\n== {what}");
}

// ---------------------------------------------------------------- installing what is missing

fn ensure_wasm_target() -> Result {
    let installed = output(Command::new("rustup").args(["target", "list", "--installed"])).unwrap_or_default();
    if !installed.lines().any(|l| l.trim() == "wasm32-unknown-unknown") {
        step("installing the wasm32-unknown-unknown target");
        run(Command::new("rustup").args(["target", "add", "wasm32-unknown-unknown"]))?;
    }
    Ok(())
}

/// The threaded core is built with the nightly toolchain: shared memory needs the standard library
/// rebuilt with atomics (`-Z build-std`), which only nightly offers.
fn ensure_nightly_wasm() -> Result {
    ensure_nightly()?;
    let components = output(Command::new("rustup").args(["component", "list", "--toolchain", "nightly", "--installed"])).unwrap_or_default();
    if !components.lines().any(|l| l.starts_with("rust-src")) {
        step("installing rust-src for nightly (the threaded core rebuilds std)");
        run(Command::new("rustup").args(["component", "add", "rust-src", "--toolchain", "nightly"]))?;
    }
    let targets = output(Command::new("rustup").args(["target", "list", "--toolchain", "nightly", "--installed"])).unwrap_or_default();
    if !targets.lines().any(|l| l.trim() == "wasm32-unknown-unknown") {
        step("installing the wasm32-unknown-unknown target for nightly");
        run(Command::new("rustup").args(["target", "add", "wasm32-unknown-unknown", "--toolchain", "nightly"]))?;
    }
    Ok(())
}

/// Flags of the threaded core: atomics and a shared, imported memory (up to wasm32's 4 GiB) whose
/// thread-local storage each pool worker sets up (the exports wasm-bindgen's thread support uses).
const THREADED_RUSTFLAGS: &str = "-C target-feature=+atomics,+bulk-memory,+mutable-globals,+simd128 \
    -C link-arg=--shared-memory -C link-arg=--max-memory=4294967296 -C link-arg=--import-memory \
    -C link-arg=--export=__wasm_init_tls -C link-arg=--export=__tls_size -C link-arg=--export=__tls_align \
    -C link-arg=--export=__tls_base";

/// The `wasm-bindgen` version in Cargo.lock; the CLI must match it exactly.
fn locked_wasm_bindgen_version() -> Result<String> {
    let lock = std::fs::read_to_string(root().join("Cargo.lock")).map_err(|e| format!("Cargo.lock: {e}"))?;
    let mut lines = lock.lines();
    while let Some(line) = lines.next() {
        if line.trim() == "name = \"wasm-bindgen\"" {
            if let Some(version) = lines.next().and_then(|l| l.trim().strip_prefix("version = \"")) {
                return Ok(version.trim_end_matches('"').to_string());
            }
        }
    }
    Err("Cargo.lock has no wasm-bindgen entry".into())
}

fn ensure_wasm_bindgen() -> Result {
    let version = locked_wasm_bindgen_version()?;
    let current = output(Command::new("wasm-bindgen").arg("--version")).unwrap_or_default();
    if current.split_whitespace().nth(1) != Some(version.as_str()) {
        step(&format!("installing wasm-bindgen-cli {version} (the version in Cargo.lock)"));
        run(Command::new("cargo").args(["install", "--force", "wasm-bindgen-cli", "--version", &version]))?;
    }
    Ok(())
}

fn apt_install(packages: &[&str]) -> Result {
    step(&format!("installing {} from Debian's packages", packages.join(", ")));
    run(Command::new("apt-get").arg("update"))?;
    run(Command::new("apt-get").args(["install", "-y", "--no-install-recommends"]).args(packages).env("DEBIAN_FRONTEND", "noninteractive"))
}

fn ensure_node() -> Result {
    if output(Command::new("node").arg("--version")).is_none() || output(Command::new("npm").arg("--version")).is_none() {
        apt_install(&["nodejs", "npm"])?;
    }
    Ok(())
}

fn ensure_npm_packages() -> Result {
    ensure_node()?;
    let installed = ["playwright-core", "uplot"].iter().all(|p| root().join("node_modules").join(p).join("package.json").exists());
    if !installed {
        step("installing the page's npm packages (npm ci)");
        run(Command::new("npm").args(["ci", "--no-audit", "--no-fund"]).current_dir(root()))?;
    }
    Ok(())
}

const CHROMIUM: &str = "/usr/bin/chromium";

fn ensure_chromium() -> Result {
    if !Path::new(CHROMIUM).exists() {
        apt_install(&["chromium"])?;
    }
    Ok(())
}

// ---------------------------------------------------------------- building the page

/// Build the wasm module and assemble the page in `dist/`; returns the folder.
fn build() -> Result<PathBuf> {
    ensure_wasm_target()?;
    ensure_wasm_bindgen()?;
    ensure_npm_packages()?;
    ensure_nightly_wasm()?;
    let root = root();
    step("building the core for wasm32 (release)");
    run(Command::new("cargo")
        .args(["build", "--release", "--lib", "-p", "bitloupe", "--target", "wasm32-unknown-unknown"])
        .current_dir(&root))?;
    step("building the threaded core for wasm32 (release, nightly, shared memory)");
    let threaded_target = root.join("target/wasm-threads");
    run(Command::new("cargo")
        .args(["+nightly", "build", "--release", "--lib", "-p", "bitloupe", "--target", "wasm32-unknown-unknown"])
        .args(["-Z", "build-std=panic_abort,std", "--target-dir"])
        .arg(&threaded_target)
        .env("CARGO_TARGET_WASM32_UNKNOWN_UNKNOWN_RUSTFLAGS", THREADED_RUSTFLAGS)
        .current_dir(&root))?;
    let dist = root.join("dist");
    let staging = root.join("target").join("dist-staging");
    let _ = std::fs::remove_dir_all(&staging);
    let mut core = String::new();
    for (pkg, wasm) in [
        ("pkg", root.join("target/wasm32-unknown-unknown/release/bitloupe.wasm")),
        ("pkg-threads", threaded_target.join("wasm32-unknown-unknown/release/bitloupe.wasm")),
    ] {
        std::fs::create_dir_all(staging.join(pkg)).map_err(|e| e.to_string())?;
        run(Command::new("wasm-bindgen")
            .args(["--target", "no-modules", "--no-typescript", "--out-dir"])
            .arg(staging.join(pkg))
            .arg(&wasm))?;
        let base64 = write_core_module(&staging.join(pkg))?;
        if pkg == "pkg" {
            core = base64;
        }
    }
    copy_dir(&root.join("www"), &staging)?;
    let vendor = staging.join("vendor");
    std::fs::create_dir_all(&vendor).map_err(|e| e.to_string())?;
    for (from, to) in [("uplot/dist/uPlot.iife.min.js", "uPlot.iife.min.js"), ("uplot/dist/uPlot.min.css", "uPlot.min.css")] {
        std::fs::copy(root.join("node_modules").join(from), vendor.join(to)).map_err(|e| format!("{from}: {e}"))?;
    }
    write_precache_list(&staging)?;
    write_single_file(&staging, &core)?;
    // Replace dist/ only once the new build is complete.
    let _ = std::fs::remove_dir_all(&dist);
    std::fs::rename(&staging, &dist).map_err(|e| format!("dist: {e}"))?;
    eprintln!("page built in {}", dist.display());
    Ok(dist)
}

/// Replace wasm-bindgen's `bitloupe_bg.wasm` in `pkg` with `bitloupe_core.js`, a module whose
/// default export is the same bytes in base64; returns that base64. The page imports it as a
/// script instead of fetching the wasm, so neither the page nor its compute workers need any
/// `connect-src`: their Content-Security-Policy forbids connecting anywhere.
fn write_core_module(pkg: &Path) -> Result<String> {
    use base64::Engine;
    let wasm_path = pkg.join("bitloupe_bg.wasm");
    let wasm = std::fs::read(&wasm_path).map_err(|e| format!("{}: {e}", wasm_path.display()))?;
    let core = base64::engine::general_purpose::STANDARD.encode(wasm);
    let module = format!("// Written by `cargo xtask build`: the core's wasm module in base64.\nexport default '{core}';\n");
    std::fs::write(pkg.join("bitloupe_core.js"), module).map_err(|e| e.to_string())?;
    std::fs::remove_file(&wasm_path).map_err(|e| e.to_string())?;
    Ok(core)
}

/// Allows what the single file needs when opened from disk: its own inline scripts and the blob:
/// URLs it makes of them, and nothing that reaches a network.
const SINGLE_FILE_CSP: &str = "default-src 'none'; script-src 'unsafe-inline' 'wasm-unsafe-eval' blob:; \
    worker-src blob:; style-src 'unsafe-inline'; img-src data: blob:; connect-src 'none'; \
    object-src 'none'; base-uri 'none'; form-action 'none'";

/// Inlined into the single file: turns the bundled sources into blob: URLs (rewriting the
/// modules' relative imports), builds the worker from the wasm glue plus `worker.js`, and starts
/// the page with the wasm bytes it carries.
const SINGLE_FILE_LOADER: &str = r#"
(() => {
  const bundle = JSON.parse(document.getElementById('bitloupe-bundle').textContent);
  const blobUrl = (text) => URL.createObjectURL(new Blob([text], { type: 'text/javascript' }));
  const style = document.createElement('style');
  style.textContent = bundle.css;
  document.head.append(style);
  const wasm = Uint8Array.from(atob(bundle.wasm), (c) => c.charCodeAt(0));
  const workerUrl = blobUrl(bundle.glue + '\n' + bundle.worker);
  window.BITLOUPE_CONFIG = { makeWorker: () => new Worker(workerUrl), wasm, noServiceWorker: true };
  const urls = {};
  const moduleUrl = (name) => urls[name] || (urls[name] = blobUrl(
    bundle.modules[name].replace(/from '\.\/([\w.-]+)'/g, (_, dep) => `from '${moduleUrl(dep)}'`)));
  const charts = document.createElement('script');
  charts.src = blobUrl(bundle.charts);
  charts.onload = () => import(moduleUrl('app.js'));
  document.head.append(charts);
})();
"#;

/// Write `bitloupe.html`: the whole page, wasm (`core`, in base64) and scripts inlined, that works
/// opened from disk.
fn write_single_file(dist: &Path, core: &str) -> Result {
    let read = |rel: &str| std::fs::read_to_string(dist.join(rel)).map_err(|e| format!("{rel}: {e}"));
    let mut modules = serde_json::Map::new();
    for entry in std::fs::read_dir(dist).map_err(|e| e.to_string())? {
        let name = entry.map_err(|e| e.to_string())?.file_name().to_string_lossy().into_owned();
        if name.ends_with(".js") && !["worker.js", "pool-worker.js", "sw.js", "precache.js"].contains(&name.as_str()) {
            modules.insert(name.clone(), read(&name)?.into());
        }
    }
    let bundle = serde_json::json!({
        "css": format!("{}
{}", read("vendor/uPlot.min.css")?, read("style.css")?),
        "charts": read("vendor/uPlot.iife.min.js")?,
        "glue": read("pkg/bitloupe.js")?,
        "worker": read("worker.js")?,
        "modules": modules,
        "wasm": core,
    });
    // "</" may not appear inside a script element; "<\/" is the same JSON string.
    let bundle = bundle.to_string().replace("</", "<\\/");
    let mut html = read("index.html")?;
    let replacements = [
        (r#"  <link rel="stylesheet" href="vendor/uPlot.min.css">"#.to_string(), String::new()),
        (r#"  <link rel="stylesheet" href="style.css">"#.to_string(), String::new()),
        (r#"  <script src="vendor/uPlot.iife.min.js"></script>"#.to_string(), String::new()),
        (page_csp(&html)?, SINGLE_FILE_CSP.to_string()),
        (
            r#"  <script type="module" src="app.js"></script>"#.to_string(),
            format!("  <script type=\"application/json\" id=\"bitloupe-bundle\">{bundle}</script>\n  <script>{SINGLE_FILE_LOADER}</script>"),
        ),
    ];
    for (from, to) in replacements {
        if !html.contains(&from) {
            return Err(format!("single-file build: index.html no longer contains {from:?}"));
        }
        html = html.replace(&from, &to);
    }
    std::fs::write(dist.join("bitloupe.html"), html).map_err(|e| e.to_string())
}

/// The page's Content-Security-Policy, kept in one place: the meta tag of `www/index.html`. The
/// server sends the same policy as a header, which is what governs the compute workers (a
/// worker's policy comes from its own response, not from the page's meta tag).
fn page_csp(html: &str) -> Result<String> {
    const PREFIX: &str = r#"<meta http-equiv="Content-Security-Policy" content=""#;
    let start = html.find(PREFIX).ok_or("index.html has no Content-Security-Policy meta tag")? + PREFIX.len();
    let len = html[start..].find('"').ok_or("unterminated Content-Security-Policy meta tag")?;
    Ok(html[start..start + len].to_string())
}

/// The service worker's policy: the page's with `connect-src 'self'`, because pre-caching the
/// page's own files for offline use is a fetch. It never receives the user's data.
fn service_worker_csp(page: &str) -> Result<String> {
    const PAGE: &str = "connect-src 'none'";
    if !page.contains(PAGE) {
        return Err(format!("the page's Content-Security-Policy no longer says {PAGE}"));
    }
    Ok(page.replace(PAGE, "connect-src 'self'"))
}

fn copy_dir(from: &Path, to: &Path) -> Result {
    for entry in std::fs::read_dir(from).map_err(|e| format!("{}: {e}", from.display()))? {
        let entry = entry.map_err(|e| e.to_string())?;
        let target = to.join(entry.file_name());
        if entry.path().is_dir() {
            std::fs::create_dir_all(&target).map_err(|e| e.to_string())?;
            copy_dir(&entry.path(), &target)?;
        } else {
            std::fs::copy(entry.path(), &target).map_err(|e| format!("{}: {e}", entry.path().display()))?;
        }
    }
    Ok(())
}

/// The service worker pre-caches every built file; list them with a build stamp so that a new
/// build replaces the old cache.
fn write_precache_list(dist: &Path) -> Result {
    let mut files = Vec::new();
    collect_files(dist, dist, &mut files)?;
    files.sort();
    let stamp = std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).map(|d| d.as_secs()).unwrap_or(0);
    let list = files.iter().map(|f| format!("  './{f}',")).collect::<Vec<_>>().join("\n");
    let text = format!("// Written by `cargo xtask build`.\nself.PRECACHE_VERSION = 'bitloupe-{stamp}';\nself.PRECACHE_FILES = [\n  './',\n{list}\n];\n");
    std::fs::write(dist.join("precache.js"), text).map_err(|e| e.to_string())
}

fn collect_files(base: &Path, dir: &Path, out: &mut Vec<String>) -> Result {
    for entry in std::fs::read_dir(dir).map_err(|e| e.to_string())? {
        let path = entry.map_err(|e| e.to_string())?.path();
        if path.is_dir() {
            collect_files(base, &path, out)?;
        } else {
            let rel = path.strip_prefix(base).expect("inside base").to_string_lossy().replace('\\', "/");
            if rel != "sw.js" {
                out.push(rel);
            }
        }
    }
    Ok(())
}

// ---------------------------------------------------------------- serving

fn content_type(path: &Path) -> &'static str {
    match path.extension().and_then(|e| e.to_str()).unwrap_or("") {
        "html" => "text/html; charset=utf-8",
        "js" | "mjs" => "text/javascript; charset=utf-8",
        "css" => "text/css; charset=utf-8",
        "wasm" => "application/wasm",
        "json" | "webmanifest" => "application/json",
        "svg" => "image/svg+xml",
        "png" => "image/png",
        _ => "application/octet-stream",
    }
}

fn serve(args: &[String]) -> Result {
    let mut port = 8080u16;
    let mut iter = args.iter();
    while let Some(arg) = iter.next() {
        match arg.as_str() {
            "--port" => port = iter.next().and_then(|p| p.parse().ok()).ok_or("--port needs a number")?,
            other => return Err(format!("unknown option {other}")),
        }
    }
    let dist = build()?;
    serve_dir(&dist, port)
}

fn serve_dir(dist: &Path, port: u16) -> Result {
    let index = std::fs::read_to_string(dist.join("index.html")).map_err(|e| format!("index.html: {e}"))?;
    let csp = page_csp(&index)?;
    let sw_csp = service_worker_csp(&csp)?;
    let listener = std::net::TcpListener::bind(("127.0.0.1", port)).map_err(|e| format!("cannot listen on 127.0.0.1:{port}: {e}"))?;
    eprintln!("\nbitloupe is ready: open http://127.0.0.1:{port}/ (press Ctrl+C to stop)");
    std::thread::scope(|scope| {
        for stream in listener.incoming().flatten() {
            let (csp, sw_csp) = (&csp, &sw_csp);
            scope.spawn(move || {
                let _ = answer(stream, dist, csp, sw_csp);
            });
        }
    });
    Ok(())
}

/// Answer one request and close the connection. A thread per connection and no keep-alive:
/// this serves a handful of static files to one local browser, and must never make one request
/// wait for another.
fn answer(mut stream: std::net::TcpStream, dist: &Path, csp: &str, sw_csp: &str) -> std::io::Result<()> {
    use std::io::{BufRead, BufReader, Read, Write};
    stream.set_read_timeout(Some(std::time::Duration::from_secs(10)))?;
    let mut reader = BufReader::new(stream.try_clone()?.take(64 * 1024));
    let mut request_line = String::new();
    reader.read_line(&mut request_line)?;
    loop {
        let mut header = String::new();
        if reader.read_line(&mut header)? == 0 || header.trim().is_empty() {
            break;
        }
    }
    let mut parts = request_line.split_whitespace();
    let (method, target) = (parts.next().unwrap_or(""), parts.next().unwrap_or("/"));
    let path = target.split(['?', '#']).next().unwrap_or("/").trim_start_matches('/');
    let relative = if path.is_empty() { "index.html" } else { path };
    let safe = !relative.split('/').any(|part| part == ".." || part.is_empty());
    let file = dist.join(relative);
    let found = if safe && (method == "GET" || method == "HEAD") { std::fs::read(&file).ok() } else { None };
    let csp = if relative == "sw.js" { sw_csp } else { csp };
    let (status, body, kind) = match found {
        Some(body) => ("200 OK", body, content_type(&file)),
        None => ("404 Not Found", b"not found".to_vec(), "text/plain; charset=utf-8"),
    };
    write!(
        stream,
        "HTTP/1.1 {status}\r\nContent-Type: {kind}\r\nContent-Length: {}\r\nContent-Security-Policy: {csp}\r\n\
         Cross-Origin-Opener-Policy: same-origin\r\nCross-Origin-Embedder-Policy: require-corp\r\n\
         Cache-Control: no-cache\r\nX-Content-Type-Options: nosniff\r\nConnection: close\r\n\r\n",
        body.len()
    )?;
    if method != "HEAD" {
        stream.write_all(&body)?;
    }
    stream.flush()
}

// ---------------------------------------------------------------- testing

fn test() -> Result {
    let root = root();
    ensure_wasm_target()?;
    ensure_wasm_bindgen()?;
    ensure_node()?;
    step("native tests");
    run(Command::new("cargo").args(["test", "--workspace"]).current_dir(&root))?;
    fuzz_smoke(&root)?;
    step("wasm32 tests under Node (wasm-bindgen-test)");
    run(Command::new("cargo")
        .args(["test", "-p", "bitloupe", "--target", "wasm32-unknown-unknown", "--test", "wasm_boundary"])
        .current_dir(&root))?;
    ensure_chromium()?;
    let dist = build()?;
    step("browser tests in headless Chromium");
    let port = free_port()?;
    let server_dist = dist.clone();
    std::thread::spawn(move || serve_dir(&server_dist, port));
    let shots = root.join("test-output").join("screenshots");
    std::fs::create_dir_all(&shots).map_err(|e| e.to_string())?;
    run(Command::new("node")
        .args(["--test", "--test-concurrency=1"])
        .arg(root.join("tests/browser"))
        .env("BITLOUPE_URL", format!("http://127.0.0.1:{port}/"))
        .env("BITLOUPE_CHROMIUM", CHROMIUM)
        .env("BITLOUPE_SCREENSHOTS", &shots)
        .env("BITLOUPE_SINGLE_FILE", dist.join("bitloupe.html"))
        .current_dir(&root))?;
    eprintln!("\nscreenshots of the page's main states: {}", shots.display());
    Ok(())
}

/// The fuzz targets of `fuzz/Cargo.toml`.
const FUZZ_TARGETS: [&str; 6] = ["npy", "safetensors", "text", "calib", "unpack", "recipe"];

/// Seconds each target runs in the smoke pass (after replaying its seeds and regressions).
const FUZZ_SMOKE_SECONDS: u32 = 5;

/// The nightly toolchain: libFuzzer's instrumentation and the threaded core's rebuilt std need it.
fn ensure_nightly() -> Result {
    if output(Command::new("rustup").args(["run", "nightly", "rustc", "--version"])).is_none() {
        step("installing the nightly toolchain (the fuzz pass and the threaded core need it)");
        run(Command::new("rustup").args(["toolchain", "install", "nightly", "--profile", "minimal"]))?;
    }
    Ok(())
}

fn ensure_cargo_fuzz() -> Result {
    ensure_nightly()?;
    if output(Command::new("cargo").args(["fuzz", "--version"])).is_none() {
        step("installing cargo-fuzz");
        run(Command::new("cargo").args(["install", "cargo-fuzz"]))?;
    }
    Ok(())
}

/// Run every fuzz target for a few seconds over its seeds and every saved crasher, so the
/// targets keep building and no fixed crash comes back. An unoptimised build without a
/// sanitizer (the core is safe Rust; overflow checks stay on) keeps this to about two and a
/// half minutes on two cores, most of it the build; the long runs use the defaults
/// (fuzz/README.md).
fn fuzz_smoke(root: &Path) -> Result {
    ensure_cargo_fuzz()?;
    step("fuzz smoke pass: each target over its seeds and regressions, then a few seconds of fuzzing");
    let scratch = root.join("target").join("fuzz-smoke");
    for target in FUZZ_TARGETS {
        let corpus = scratch.join("corpus").join(target);
        let artifacts = scratch.join("artifacts").join(target);
        for dir in [&corpus, &artifacts] {
            std::fs::create_dir_all(dir).map_err(|e| format!("{}: {e}", dir.display()))?;
        }
        let fuzz = root.join("fuzz");
        // A target with no regressions has no folder for them (git keeps no empty folders), and
        // libFuzzer stops at a missing one.
        let inputs = [fuzz.join("seeds").join(target), fuzz.join("regressions").join(target)];
        run(Command::new("rustup")
            .args(["run", "nightly", "cargo", "fuzz", "run", "--dev", "--sanitizer", "none", "--target-dir"])
            .arg(scratch.join("build"))
            .arg(target)
            .arg(&corpus)
            .args(inputs.iter().filter(|dir| dir.is_dir()))
            .arg("--")
            .arg(format!("-max_total_time={FUZZ_SMOKE_SECONDS}"))
            .args(["-rss_limit_mb=2048", "-timeout=10"])
            .arg(format!("-artifact_prefix={}/", artifacts.display()))
            // The build is most of the pass; debug info would add a sixth to it.
            .env("CARGO_PROFILE_DEV_DEBUG", "0")
            // `cargo xtask` runs under the stable toolchain; let rustup choose nightly's tools.
            .env_remove("RUSTUP_TOOLCHAIN")
            .env_remove("RUSTC")
            .env_remove("CARGO")
            .current_dir(&fuzz))?;
    }
    Ok(())
}

/// The native benchmarks, then the in-browser benchmark against a freshly built page.
fn bench() -> Result {
    let root = root();
    step("native benchmarks (divan)");
    run(Command::new("cargo").args(["bench", "-p", "bitloupe"]).current_dir(&root))?;
    run(Command::new("cargo").args(["build", "--release", "-p", "bitloupe", "--bin", "bitloupe", "--example", "bench_case"]).current_dir(&root))?;
    ensure_chromium()?;
    let dist = build()?;
    step("speed table: native, wasm under Node, numpy (bench/compare.py)");
    let node_pkg = root.join("target/bench-node");
    run(Command::new("wasm-bindgen")
        .args(["--target", "nodejs", "--no-typescript", "--out-dir"])
        .arg(&node_pkg)
        .arg(root.join("target/wasm32-unknown-unknown/release/bitloupe.wasm")))?;
    if output(Command::new("python3").args(["-c", "import numpy"])).is_none() {
        step("installing numpy for the comparison (fixtures/requirements.txt)");
        run(Command::new("python3").args(["-m", "pip", "install", "-r"]).arg(root.join("fixtures/requirements.txt")))?;
    }
    run(Command::new("python3")
        .arg(root.join("bench/compare.py"))
        .env("BENCH_CASE", root.join("target/release/examples/bench_case"))
        .env("WASM_PKG", &node_pkg)
        .current_dir(&root))?;
    step("in-browser benchmark (headless Chromium)");
    let port = free_port()?;
    std::thread::spawn(move || serve_dir(&dist, port));
    run(Command::new("node")
        .arg(root.join("bench/page.mjs"))
        .env("BITLOUPE_URL", format!("http://127.0.0.1:{port}/"))
        .env("BITLOUPE_BIN", root.join("target/release/bitloupe"))
        .env("BENCH_CASE", root.join("target/release/examples/bench_case"))
        .env("BITLOUPE_CHROMIUM", CHROMIUM)
        .current_dir(&root))
}

fn free_port() -> Result<u16> {
    let listener = std::net::TcpListener::bind(("127.0.0.1", 0)).map_err(|e| e.to_string())?;
    listener.local_addr().map(|a| a.port()).map_err(|e| e.to_string())
}
