//! Per-stage timings of the reader on generated models (`tilecut dev bench-models DIR`).
//! Run: `cargo bench --bench stages -- DIR [MODEL]`. Prints medians of 5 runs per stage. `load ms`
//! reads the file as the binary's `inspect` does (mapped for the process's life, the main
//! nodes checked and kept in wire form: `onnx::load::load_for_import`); `shared` decodes it
//! whole as `split` and other callers of `onnx::load::load` do. Stacks are read
//! twice: with `--dim batch=1`, and with the batch left symbolic (`… symbolic`), as
//! `bench/run.sh` reads them with `inspect` and the Python pair.
//! `-- DIR MODEL --inproc` prints one number instead: the median milliseconds of five rounds
//! of read + import + inference + report, batch symbolic (see `inproc`).

use std::path::PathBuf;
use std::time::Instant;

use tilecut::onnx::load::MapLife;

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(|a, b| a.total_cmp(b));
    v[v.len() / 2]
}

// The binary's allocator and setting, so the figures are the binary's.
#[global_allocator]
static ALLOCATOR: mimalloc::MiMalloc = mimalloc::MiMalloc;

fn main() {
    tilecut::tune_allocator();
    // `DIR [MODEL]`: a model name (`stack_100k`) times that model alone.
    let args: Vec<String> = std::env::args().skip(1).filter(|a| !a.starts_with('-')).collect();
    let dir = args
        .first()
        .map(PathBuf::from)
        .unwrap_or_else(|| PathBuf::from("bench-models"));
    let only = args.get(1);
    if std::env::args().any(|a| a == "--inproc") {
        let Some(name) = only else {
            eprintln!("--inproc needs a model name");
            std::process::exit(2);
        };
        println!("{:.1}", inproc(&dir.join(format!("{name}.onnx"))));
        return;
    }
    println!(
        "{:<22} {:>9} {:>9} {:>9} {:>9} {:>9} {:>9} {:>9} {:>9} {:>12}",
        "model", "load ms", "shared", "import", "infer", "report", "json", "judge", "cut", "cut/10k nodes"
    );
    let target = tilecut::target::load("wide-array").expect("built-in target");
    let mut overrides = tilecut::Overrides::default();
    overrides.add_dim("batch=1").expect("valid");
    for name in [
        "stack_10k",
        "stack_30k",
        "stack_50k",
        "stack_100k",
        "stack_200k",
        "heavy_1g_inline",
        "heavy_1g_external",
    ] {
        let path = dir.join(format!("{name}.onnx"));
        if !path.exists() || only.is_some_and(|o| o != name) {
            continue;
        }
        // With the batch fixed, as a user sizing a model would run it; and for the stacks also
        // with it symbolic, as the Python pair in `bench/run.sh` reads the same file.
        let symbolic = tilecut::Overrides::default();
        let variants: &[(&str, &tilecut::Overrides)] = if name.starts_with("stack_") {
            &[("", &overrides), (" symbolic", &symbolic)]
        } else {
            &[("", &overrides)]
        };
        for (suffix, o) in variants {
            let (t, nodes) = measure(&path, o, &target);
            print_row(&format!("{name}{suffix}"), t, nodes);
        }
    }
}

/// What `bench/run.sh` sets against the Python pair's time inside its process: read + import +
/// inference + report as `inspect` runs them (`read_model_with`, the map kept for the
/// process), the median of five rounds as in the stage table, with the batch left symbolic as
/// the Python pair reads it. One figure per process, so that the script can take turns with
/// the Python pair's runs instead of timing one side after the other.
fn inproc(path: &std::path::Path) -> f64 {
    let symbolic = tilecut::Overrides::default();
    let mut t = Vec::new();
    for _ in 0..5 {
        let s = Instant::now();
        let read = tilecut::read_model_with(path, &symbolic, MapLife::Process).expect("read");
        let report = tilecut::report::inspect::build(&read.model, &read.diags, &read.unknown);
        t.push(s.elapsed().as_secs_f64() * 1e3);
        std::hint::black_box(report);
    }
    median(t)
}

fn print_row(name: &str, t: Vec<Vec<f64>>, nodes: usize) {
    let m: Vec<f64> = t.into_iter().map(median).collect();
    let per10k = if nodes > 0 { m[6] * 10_000.0 / nodes as f64 } else { 0.0 };
    println!(
        "{:<22} {:>9.1} {:>9.1} {:>9.1} {:>9.1} {:>9.1} {:>9.1} {:>9.1} {:>9.1} {:>12.1}",
        name, m[0], m[7], m[1], m[2], m[3], m[4], m[5], m[6], per10k
    );
}

/// Per-stage times of five reads of `path` with `overrides`: (times per stage, node count).
fn measure(
    path: &std::path::Path,
    overrides: &tilecut::Overrides,
    target: &tilecut::target::Target,
) -> (Vec<Vec<f64>>, usize) {
    let mut t = vec![Vec::new(); 8];
    let mut nodes = 0usize;
    for _ in 0..5 {
        let s = Instant::now();
        let shared = tilecut::onnx::load::load(path).expect("load");
        t[7].push(s.elapsed().as_secs_f64() * 1e3);
        drop(shared);
        let s = Instant::now();
        let loaded = tilecut::onnx::load::load_for_import(path, MapLife::Process).expect("load");
        t[0].push(s.elapsed().as_secs_f64() * 1e3);
        let s = Instant::now();
        let (mut model, mut diags) = tilecut::import::import(&loaded, overrides).expect("import");
        t[1].push(s.elapsed().as_secs_f64() * 1e3);
        drop(loaded);
        let s = Instant::now();
        let unknown = tilecut::infer::infer(&mut model, &mut diags);
        t[2].push(s.elapsed().as_secs_f64() * 1e3);
        let s = Instant::now();
        let report = tilecut::report::inspect::build(&model, &diags, &unknown);
        t[3].push(s.elapsed().as_secs_f64() * 1e3);
        let s = Instant::now();
        let mut out = Vec::new();
        tilecut::report::inspect::render_json(&report, &mut out).expect("json");
        t[4].push(s.elapsed().as_secs_f64() * 1e3);
        let s = Instant::now();
        let verdicts = tilecut::rules::judge(&model.graph, &model.opsets, target);
        t[5].push(s.elapsed().as_secs_f64() * 1e3);
        let s = Instant::now();
        let costs = tilecut::cut::cost::costs(&model.graph, &verdicts, target);
        let plan = tilecut::cut::plan(
            &model.graph,
            &verdicts,
            &costs,
            tilecut::cut::Strategy::Mincut,
            &Default::default(),
        )
        .expect("plan");
        t[6].push(s.elapsed().as_secs_f64() * 1e3);
        nodes = model.graph.nodes.len();
        std::hint::black_box(plan);
    }
    (t, nodes)
}
