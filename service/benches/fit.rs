//! Benchmarks of the lumped fit on a 1601-point synthetic sweep (an invented 47 µH power choke with
//! analyser-like noise, see tests/common/synth.rs):
//! - `fit_1601/single_structure`: LM on the structure l0+rdc+cp+rp+k_ac+ls from the curve-based
//!   starting values — the same problem tests/bench/fit_vs_scipy.py gives scipy `least_squares`;
//! - `fit_1601/normal_equations`: one fused pass (χ², JᵀJ, Jᵀr) over the 1601 points, the unit of
//!   work of one LM iteration;
//! - `fit_1601/full_selection`: the whole engine (starting values, every candidate, BIC, uncertainty,
//!   derived figures).
//!
//! Before measuring, the sweep, structure and starting point are written to
//! target/bench-data/fit_1601.json for the scipy side of the comparison.

// The tests' synthetic sweeps (a benchmark of this crate cannot depend on henrybook-tests, which
// depends on it).
#[path = "../../tests/common/synth.rs"]
#[allow(dead_code)]
mod fit_synth;

use criterion::{Criterion, criterion_group, criterion_main};
use henrybook::fit::lumped::{fit_structure, prepare};
use henrybook::fit::{FitControl, FitOptions, fit, initial};
use henrybook::model::lumped::Structure;
use henrybook::sweep::Method;
use std::hint::black_box;
use std::time::Duration;

fn write_problem(path: &std::path::Path, json: &serde_json::Value) {
    std::fs::create_dir_all(path.parent().expect("has a parent"))
        .expect("create target/bench-data");
    std::fs::write(path, json.to_string()).expect("write the benchmark problem");
}

fn bench(c: &mut Criterion) {
    let truth = fit_synth::power_choke();
    let sweep = fit_synth::synthetic_sweep(&truth, 1e3, 200e6, 1601, Method::Direct, 1601);
    let options = FitOptions::default();
    let data = prepare(&sweep, &options).expect("valid sweep");
    let start = initial::guess(&data).base;
    let structure = Structure::of(&start);
    let control = FitControl::default();
    let once = fit_structure(
        &data,
        &structure,
        &start,
        200,
        Duration::from_secs(10),
        &control,
    )
    .expect("fits");
    let dir = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("../target/bench-data");
    write_problem(
        &dir.join("fit_1601.json"),
        &serde_json::json!({
            "frequency_hz": sweep.frequency_hz,
            "z_re": sweep.impedance_ohm.iter().map(|z| z.re).collect::<Vec<_>>(),
            "z_im": sweep.impedance_ohm.iter().map(|z| z.im).collect::<Vec<_>>(),
            "sigma": sweep.sigma_ohm,
            "structure": {
                "has_rp": structure.has_rp,
                "has_k_ac": structure.has_k_ac,
                "has_ls": structure.has_ls,
                "sections": structure.sections,
            },
            "start": structure.pack(&start),
            "henrybook": once.theta,
            "henrybook_chi2": once.cost,
            "henrybook_iterations": once.iterations,
            "dcr": serde_json::Value::Null,
        }),
    );

    let mut g = c.benchmark_group("fit_1601");
    g.sample_size(30);
    let problem = henrybook::fit::problem::LumpedProblem::new(&data, &structure);
    let theta = structure.pack(&start);
    let mut r = vec![0.0; data.residual_count()];
    let mut j = nalgebra::DMatrix::zeros(data.residual_count(), structure.len());
    g.bench_function("residuals", |b| {
        b.iter(|| problem.residuals_into(black_box(&theta), &mut r))
    });
    g.bench_function("jacobian", |b| {
        b.iter(|| problem.jacobian_into(black_box(&theta), &mut j))
    });
    let n = structure.len();
    let (mut jtj, mut jr) = (nalgebra::DMatrix::zeros(n, n), nalgebra::DVector::zeros(n));
    g.bench_function("normal_equations", |b| {
        b.iter(|| problem.normal_equations_into(black_box(&theta), &mut jtj, &mut jr))
    });
    g.bench_function("single_structure", |b| {
        b.iter(|| {
            fit_structure(
                black_box(&data),
                &structure,
                black_box(&start),
                200,
                Duration::from_secs(10),
                &control,
            )
            .expect("fits")
        })
    });
    g.bench_function("full_selection", |b| {
        b.iter(|| fit(black_box(&sweep), &options, &control).expect("fits"))
    });
    g.finish();
}

criterion_group!(benches, bench);
criterion_main!(benches);
