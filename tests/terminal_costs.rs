//! Built-in terminal costs against their direct formulas.
use candle_core::{Device, Tensor};
use neural_sde::*;

#[test]
fn bernoulli_cost_matches_direct_formula() {
    // −log p(y | l) = log(1 + e^l) − y l for a Bernoulli with logit l (common practice).
    let l = Tensor::new(&[[0.3f64, -2.0, 40.0]], &Device::Cpu).unwrap();
    let y = Tensor::new(&[[1.0f64, 0.0, 1.0]], &Device::Cpu).unwrap();
    let got = BernoulliNll::new()
        .cost(&l, Some(&y))
        .unwrap()
        .to_vec1::<f64>()
        .unwrap()[0];
    let want: f64 = [(0.3f64, 1.0f64), (-2.0, 0.0), (40.0, 1.0)]
        .iter()
        .map(|(l, y)| (1.0 + l.exp()).ln() - y * l)
        .sum();
    assert!((got - want).abs() < 1e-12, "{got} vs {want}");
}
