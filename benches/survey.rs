//! What a survey's lifts cost: per model, the time to read it once, to run the stages once,
//! and the median time to lift one blocker (only the affected stages), against analyzing the
//! file again from scratch for the same scenario. Run: `cargo bench --bench survey [-- DIR]`.
//! The collection is the sample models plus generated transformer-like stacks (written into
//! DIR, default `bench-models/survey`).

use std::path::{Path, PathBuf};
use std::time::Instant;

use tilecut::survey::{self, DimLifts};

fn median(mut v: Vec<f64>) -> f64 {
    if v.is_empty() {
        return 0.0;
    }
    v.sort_by(|a, b| a.total_cmp(b));
    v[v.len() / 2]
}

fn ms(t: Instant) -> f64 {
    t.elapsed().as_secs_f64() * 1e3
}

fn collection(dir: &Path) -> Vec<PathBuf> {
    std::fs::create_dir_all(dir).expect("bench folder");
    let mut out = Vec::new();
    for (name, model) in tilecut::samples::all().expect("samples build") {
        let p = dir.join(name);
        std::fs::write(&p, prost::Message::encode_to_vec(&model)).expect("write sample");
        out.push(p);
    }
    for n in [1_000usize, 2_000, 5_000, 10_000] {
        let p = dir.join(format!("stack_{n}.onnx"));
        std::fs::write(&p, tilecut::benchgen::stack(n).encode()).expect("write stack");
        out.push(p);
    }
    out
}

// The binary's allocator and setting, so the figures are the binary's.
#[global_allocator]
static ALLOCATOR: mimalloc::MiMalloc = mimalloc::MiMalloc;

fn main() {
    tilecut::tune_allocator();
    let dir = std::env::args()
        .skip(1)
        .find(|a| !a.starts_with('-'))
        .map(PathBuf::from)
        .unwrap_or_else(|| PathBuf::from("bench-models/survey"));
    let files = collection(&dir);
    let overrides = tilecut::Overrides::default();
    let dims = DimLifts::default();
    for target_name in ["compact-array", "wide-array"] {
        let target = tilecut::target::load(target_name).expect("built-in target");
        println!("target {target_name}: medians of 3 runs, ms");
        println!(
            "{:<40} {:>7} {:>8} {:>8} {:>8} {:>10} {:>12} {:>7}",
            "model", "nodes", "blockers", "read", "stages", "lift each", "reload each", "ratio"
        );
        let (mut lifted_total, mut reload_total) = (0.0, 0.0);
        for path in &files {
            let mut t_read = Vec::new();
            let mut t_stages = Vec::new();
            let mut t_lift = Vec::new();
            let mut t_reload = Vec::new();
            let mut nodes = 0;
            let mut blockers = 0;
            for _ in 0..3 {
                let s = Instant::now();
                let loaded = tilecut::onnx::load::load(path).expect("load");
                let read = tilecut::read_loaded(&loaded, &overrides).expect("read");
                t_read.push(ms(s));
                let s = Instant::now();
                let base = tilecut::run_stages(&read, target.clone(), &Default::default()).expect("stages");
                t_stages.push(ms(s));
                nodes = read.model.graph.nodes.len();
                let keys = survey::blockers(&read, &base);
                blockers = keys.len();
                for key in keys.keys() {
                    let s = Instant::now();
                    let f = survey::lift(key, &read, &base, &loaded, &overrides, &dims).expect("lift");
                    t_lift.push(ms(s));
                    std::hint::black_box(f);
                    // The naive way: read the file again and run every stage under the what-if.
                    let s = Instant::now();
                    let (w, _) = survey::what_if_for(key, &dims);
                    let mut o = overrides.clone();
                    if key.kind == survey::Kind::Dim {
                        o.dims.insert(key.name.clone(), dims.value(&key.name));
                    }
                    let opts = tilecut::AnalyzeOptions {
                        what_if: w,
                        ..Default::default()
                    };
                    let a = tilecut::analyze_stages(path, &o, target.clone(), &opts).expect("analyze");
                    t_reload.push(ms(s));
                    std::hint::black_box(a.plan.objective_ps);
                }
            }
            let (l, r) = (median(t_lift.clone()), median(t_reload.clone()));
            lifted_total += t_lift.iter().sum::<f64>() / 3.0;
            reload_total += t_reload.iter().sum::<f64>() / 3.0;
            println!(
                "{:<40} {:>7} {:>8} {:>8.2} {:>8.2} {:>10.2} {:>12.2} {:>6.1}x",
                path.file_name().and_then(|f| f.to_str()).unwrap_or("?"),
                nodes,
                blockers,
                median(t_read),
                median(t_stages),
                l,
                r,
                if l > 0.0 { r / l } else { 0.0 }
            );
        }
        println!(
            "all lifts: {lifted_total:.1} ms re-running only the affected stages, {reload_total:.1} ms re-reading ({:.1}x)",
            if lifted_total > 0.0 { reload_total / lifted_total } else { 0.0 }
        );
        for jobs in [1usize, 2] {
            let s = Instant::now();
            let req = survey::Request {
                paths: std::slice::from_ref(&dir),
                target: &target,
                overrides: &overrides,
                jobs,
                dim_lifts: dims.clone(),
            };
            let r = survey::survey(&req, &|_, _| {}).expect("survey");
            println!(
                "whole survey, {jobs} job(s): {:.1} ms for {} models, {} ranked blockers",
                ms(s),
                r.models.len(),
                r.ranking.len()
            );
        }
        println!();
    }
}
