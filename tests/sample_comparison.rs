//! The statistics `evaluate --against` reports, against a general-purpose reference library
//! (values computed with SciPy 1.17.1 and NumPy 2.4, quoted beside each check), and the
//! permutation test's behaviour at its two extremes.
use neural_sde::{compare_samples, CompareOptions, Table};

fn one_column(v: &[f64]) -> Table {
    Table::new(vec!["x".into()], v.iter().map(|&x| vec![x]).collect()).unwrap()
}

const A: [f64; 10] = [0.3, 1.7, 2.2, -0.5, 0.9, 3.1, 1.2, 0.0, 2.6, 1.9];
const B: [f64; 8] = [1.1, 2.4, 0.7, 3.3, 2.9, 1.5, 4.0, 2.0];

#[test]
fn kolmogorov_smirnov_and_energy_distance_match_scipy() {
    let c = compare_samples(&one_column(&A), &one_column(&B), CompareOptions::default()).unwrap();
    // scipy.stats.ks_2samp(A, B).statistic = 0.325
    assert_eq!(c.columns[0].statistic, "ks");
    assert!(
        (c.columns[0].value - 0.325).abs() < 1e-12,
        "{}",
        c.columns[0].value
    );
    // The rows are scaled by the data's (B's) population sd, 1.0582267006648434;
    // scipy.stats.energy_distance(A/sd, B/sd)**2 = 0.3814163824692931 (SciPy returns the
    // square root of the energy distance).
    assert!(
        (c.energy_distance - 0.381_416_382_469_293_1).abs() < 1e-12,
        "{}",
        c.energy_distance
    );
    assert!(c.max_correlation_difference.is_nan());
}

#[test]
fn correlation_gap_matches_numpy() {
    let x = [
        [0.3, 1.0],
        [1.7, 2.1],
        [2.2, 1.9],
        [-0.5, 0.2],
        [0.9, 1.4],
        [3.1, 2.2],
        [1.2, 0.4],
        [0.0, 0.9],
    ];
    let y = [
        [1.1, 0.2],
        [2.4, 1.0],
        [0.7, 1.9],
        [3.3, 0.5],
        [2.9, 2.5],
        [1.5, 1.1],
    ];
    let t = |rows: &[[f64; 2]]| {
        Table::new(
            vec!["a".into(), "b".into()],
            rows.iter().map(|r| r.to_vec()).collect(),
        )
        .unwrap()
    };
    let c = compare_samples(&t(&x), &t(&y), CompareOptions::default()).unwrap();
    // numpy: abs(corrcoef(x.T) - corrcoef(y.T)).max() = 0.7755318170126732
    assert!((c.max_correlation_difference - 0.775_531_817_012_673_2).abs() < 1e-12);
}

#[test]
fn permutation_p_value_at_its_extremes() {
    // Identical samples: the energy distance is 0 and no relabelling gives less, so p = 1.
    let c = compare_samples(&one_column(&A), &one_column(&A), CompareOptions::default()).unwrap();
    assert!(c.energy_distance.abs() < 1e-12);
    assert_eq!(c.energy_p_value, 1.0);
    // Samples far apart: every relabelling mixes them, so the observed distance is the
    // largest and p is the smallest possible, 1 / (1 + permutations).
    let far: Vec<f64> = A.iter().map(|v| v + 100.0).collect();
    let c = compare_samples(
        &one_column(&far),
        &one_column(&A),
        CompareOptions::default(),
    )
    .unwrap();
    assert_eq!(c.energy_p_value, 1.0 / 200.0);
    assert_eq!(c.columns[0].value, 1.0);
    let none = CompareOptions {
        permutations: 0,
        ..CompareOptions::default()
    };
    let e = compare_samples(&one_column(&A), &one_column(&B), none).unwrap_err();
    assert!(e.to_string().contains("at least 1 permutation"), "{e}");
}

#[test]
fn total_variation_of_level_frequencies() {
    // Frequencies (1/2, 1/4, 1/4) against (1/4, 1/4, 1/2): TV = ½ (1/4 + 0 + 1/4) = 1/4
    // (definition of the total variation distance of discrete laws; common practice, no
    // source).
    let dir = std::env::temp_dir().join(format!("nsde-tv-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let write = |name: &str, labels: &[&str]| {
        let p = dir.join(name);
        let mut s = String::from("x,g\n");
        for (i, l) in labels.iter().enumerate() {
            s += &format!("{}.5,{l}\n", i);
        }
        std::fs::write(&p, s).unwrap();
        p
    };
    let rules = neural_sde::ColumnRules::default();
    let a = Table::from_csv_typed(
        write("a.csv", &["u", "u", "v", "w"]),
        None,
        Default::default(),
        &rules,
    )
    .unwrap();
    let b = Table::from_csv_schema(
        write("b.csv", &["u", "v", "w", "w"]),
        a.columns(),
        Default::default(),
        &neural_sde::Schema {
            kinds: a.kinds().to_vec(),
            missing_markers: vec![],
        },
    )
    .unwrap();
    let c = compare_samples(&a, &b, CompareOptions::default()).unwrap();
    assert_eq!(c.columns[1].statistic, "tv");
    assert!((c.columns[1].value - 0.25).abs() < 1e-12);
    std::fs::remove_dir_all(&dir).ok();
}
