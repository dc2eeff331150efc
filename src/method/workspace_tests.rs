use super::*;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;

/// Every method kind for K classes, with parameters drawn from `rng`.
fn methods(k: usize, rng: &mut ChaCha8Rng) -> Vec<Method> {
    let mut normal = |scale: f64| -> f64 { scale * rng.sample::<f64, _>(StandardNormal) };
    let square: Vec<Vec<f64>> = (0..k)
        .map(|r| {
            (0..k)
                .map(|c| f64::from(u8::from(r == c)) + normal(0.1))
                .collect()
        })
        .collect();
    let biases: Vec<f64> = (0..k).map(|_| normal(0.3)).collect();
    let weights: Vec<f64> = (0..k).map(|_| 1.0 + normal(0.2)).collect();
    let n = OneVsRest::<Platt>::maps_needed(k);
    // Knot counts with no full block, several blocks and a partial one, and past the counted
    // limit, so every search path is covered.
    let isotonic = |knots: usize| -> Isotonic {
        let x = (0..knots)
            .map(|i| i as f64 / (knots - 1) as f64)
            .collect::<Vec<_>>();
        let y = x.iter().map(|v| v * v).collect();
        Isotonic::try_new(x, y, "m").unwrap()
    };
    let edges = vec![0.0, 0.1, 0.3, 0.6, 1.0];
    let values = vec![0.02, 0.2, 0.5, 0.9];
    vec![
        Method::Identity,
        Method::Temperature(Temperature::try_new(1.7, "t").unwrap()),
        Method::Vector(VectorScaling::try_new(k, weights, biases.clone(), "m").unwrap()),
        Method::Matrix(MatrixScaling::try_new(k, square.clone(), biases.clone(), "m").unwrap()),
        Method::Dirichlet(Dirichlet::try_new(k, square, biases, 1e-12, "m").unwrap()),
        Method::Platt(
            OneVsRest::try_new(k, vec![Platt::try_new(-1.1, 0.2, "m").unwrap(); n], "m").unwrap(),
        ),
        Method::Histogram(
            OneVsRest::try_new(
                k,
                vec![Histogram::try_new(edges.clone(), values.clone(), "m").unwrap(); n],
                "m",
            )
            .unwrap(),
        ),
        Method::Isotonic(OneVsRest::try_new(k, vec![isotonic(7); n], "m").unwrap()),
        Method::Isotonic(OneVsRest::try_new(k, vec![isotonic(67); n], "m").unwrap()),
        Method::Isotonic(
            OneVsRest::try_new(
                k,
                vec![isotonic((FENCE_BLOCKS_MAX * KNOT_BLOCK + 1) * KNOT_BLOCK + 9); n],
                "m",
            )
            .unwrap(),
        ),
        Method::Bbq(
            OneVsRest::try_new(
                k,
                vec![
                    Bbq::try_new(
                        vec![BbqModel {
                            weight: 1.0,
                            edges: edges.clone(),
                            values: values.clone()
                        }],
                        "m"
                    )
                    .unwrap();
                    n
                ],
                "m",
            )
            .unwrap(),
        ),
        Method::Beta(
            OneVsRest::try_new(
                k,
                vec![BetaCalibration::try_new(0.8, 1.3, 0.2, 1e-12, "m").unwrap(); n],
                "m",
            )
            .unwrap(),
        ),
    ]
}

#[test]
fn every_instruction_set_gives_the_same_bits() {
    // The x86-64 baseline against the widest set detected (AVX-512 or AVX2 where present).
    let mut rng = ChaCha8Rng::seed_from_u64(11);
    for k in [2usize, 3, 10, 37, 300] {
        let rows: Vec<Vec<f32>> = (0..20)
            .map(|_| {
                (0..k)
                    .map(|_| (3.0 * rng.sample::<f64, _>(StandardNormal)) as f32)
                    .collect()
            })
            .collect();
        for method in methods(k, &mut rng) {
            let mut scalar = Workspace::with_arch(Arch::Scalar);
            let mut best = Workspace::new();
            for row in &rows {
                let a: Vec<u64> = scalar
                    .apply(&method, InputForm::Logits, k, row)
                    .iter()
                    .map(|v| v.to_bits())
                    .collect();
                let b: Vec<u64> = best
                    .apply(&method, InputForm::Logits, k, row)
                    .iter()
                    .map(|v| v.to_bits())
                    .collect();
                assert_eq!(a, b, "{} at K = {k}", method.kind());
            }
        }
    }
}

#[test]
fn knot_counting_finds_the_same_interval_as_binary_search() {
    // The two searches of the one-vs-rest knot table agree: evaluate one curve stored with few
    // knots (counted) and with the same knots padded past the limit by exact midpoints (searched).
    let limit = (FENCE_BLOCKS_MAX * KNOT_BLOCK + 1) * KNOT_BLOCK;
    let few = limit / 2 + 45;
    let x: Vec<f64> = (0..few).map(|i| i as f64 / (few - 1) as f64).collect();
    let y: Vec<f64> = x.iter().map(|v| v.sqrt()).collect();
    assert!(few <= limit && !few.is_multiple_of(KNOT_BLOCK));
    let short = Isotonic::try_new(x.clone(), y.clone(), "m").unwrap();
    let (mut xl, mut yl) = (Vec::new(), Vec::new());
    for i in 0..few {
        xl.push(x[i]);
        yl.push(y[i]);
        if i + 1 < few {
            xl.push((x[i] + x[i + 1]) / 2.0);
            yl.push((y[i] + y[i + 1]) / 2.0);
        }
    }
    let long = Isotonic::try_new(xl, yl, "m").unwrap();
    assert!(long.x().len() > limit);
    let table = KnotTable::new(&[&short, &long, &short]).unwrap();
    // Points in the first block, on fences, in the last (partial) block and on knots.
    for s in [
        0.0,
        0.001,
        0.013,
        x[7],
        x[8],
        0.25,
        0.5,
        x[5],
        0.777,
        x[few - 3],
        0.9999,
        1.0,
    ] {
        // Linear interpolation of a linear interpolation at its own midpoints: the same line.
        let (a, b) = (table.value(0, s), table.value(1, s));
        assert!((a - b).abs() <= 1e-15, "s = {s}: {a} vs {b}");
    }
}

#[test]
fn the_argmax_and_narrowed_row_match_plain_code_on_every_instruction_set() {
    let mut rng = ChaCha8Rng::seed_from_u64(12);
    let method = Method::Temperature(Temperature::try_new(1.3, "t").unwrap());
    for k in [2usize, 9, 1000] {
        let row: Vec<f32> = (0..k)
            .map(|_| (2.0 * rng.sample::<f64, _>(StandardNormal)) as f32)
            .collect();
        for arch in [Arch::Scalar, Arch::new()] {
            let mut ws = Workspace::with_arch(arch);
            let q = ws.apply(&method, InputForm::Logits, k, &row).to_vec();
            let mut out = vec![7.0f32; 3];
            let best = ws.argmax_narrowed(Some(&mut out));
            assert_eq!(best, crate::numeric::argmax(&q));
            let want: Vec<f32> = q.iter().map(|&v| v as f32).collect();
            assert_eq!(out, want);
            assert_eq!(ws.argmax_narrowed(None), best);
            assert_eq!(ws.row(), q);
        }
    }
}
