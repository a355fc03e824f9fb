//! The fused LSTM against PyTorch's `torch.nn.LSTM` (gate order i, f, g, o): forward
//! outputs and every gradient on fixed weights and inputs.
//!
//! Source of the expected values: PyTorch, via `tests/reference/lstm_fixture.json` and
//! `lstm_fixture_wide.json` (40 hidden units, enough for the op to split them over
//! threads), made by `tests/reference/make_lstm_fixture.py` (float64 math on
//! f32-representable inputs). Each fixture is checked on one thread and split over two
//! and three (the op uses no more threads than the machine has cores; the unit tests in
//! `lstm.rs` run teams of three directly).

use candle_core::{Device, Tensor, Var};
use mnemon_nets::lstm::lstm_sequence;

fn fixture(name: &str) -> serde_json::Value {
    let path = format!(
        "{}/../../tests/reference/{name}",
        env!("CARGO_MANIFEST_DIR")
    );
    serde_json::from_str(&std::fs::read_to_string(path).expect("fixture present"))
        .expect("fixture is JSON")
}

fn floats(f: &serde_json::Value, key: &str) -> Vec<f32> {
    f[key]
        .as_array()
        .unwrap_or_else(|| panic!("fixture key {key}"))
        .iter()
        .map(|v| v.as_f64().unwrap() as f32)
        .collect()
}

fn assert_close(got: &[f32], want: &[f32], what: &str) {
    let what = format!("{what} ({} threads)", mnemon_nets::threads::threads());
    assert_eq!(got.len(), want.len(), "{what}: length");
    let scale = want.iter().fold(1e-6f32, |m, x| m.max(x.abs()));
    let err = got
        .iter()
        .zip(want)
        .fold(0f32, |m, (a, b)| m.max((a - b).abs()));
    assert!(
        err <= 1e-5 * scale,
        "{what}: max error {err} relative to scale {scale}"
    );
}

fn to_vec(t: &Tensor) -> Vec<f32> {
    t.flatten_all().unwrap().to_vec1::<f32>().unwrap()
}

// One test function: the thread count is process-wide.
#[test]
fn fused_lstm_matches_pytorch_nn_lstm() {
    for name in ["lstm_fixture.json", "lstm_fixture_wide.json"] {
        for threads in [1, 2, 3] {
            mnemon_nets::threads::set_threads(threads);
            check(name);
        }
    }
    mnemon_nets::threads::set_threads(1);
}

fn check(name: &str) {
    let f = fixture(name);
    let n = |k: &str| f[k].as_u64().unwrap() as usize;
    let (t, b, i, h) = (n("T"), n("B"), n("I"), n("H"));
    let dev = Device::Cpu;
    let w_ih = Var::from_vec(floats(&f, "weight_ih"), (4 * h, i), &dev).unwrap();
    let w_hh = Var::from_vec(floats(&f, "weight_hh"), (4 * h, h), &dev).unwrap();
    let bias: Vec<f32> = floats(&f, "bias_ih")
        .iter()
        .zip(floats(&f, "bias_hh"))
        .map(|(a, b)| a + b)
        .collect();
    let bias = Var::from_vec(bias, 4 * h, &dev).unwrap();
    let x = Var::from_vec(floats(&f, "x"), (t * b, i), &dev).unwrap(); // time-major rows
    let h0 = Var::from_vec(floats(&f, "h0"), (1, b, h), &dev).unwrap();
    let c0 = Var::from_vec(floats(&f, "c0"), (1, b, h), &dev).unwrap();
    let state0 = Tensor::cat(&[h0.as_tensor(), c0.as_tensor()], 0).unwrap();
    let xg = x
        .as_tensor()
        .matmul(&w_ih.as_tensor().t().unwrap())
        .unwrap()
        .broadcast_add(bias.as_tensor())
        .unwrap();
    let out = lstm_sequence(&xg, w_hh.as_tensor(), &state0, t).unwrap(); // [2, T, B, H]
    let hs = out.get(0).unwrap();
    let c_last = out.get(1).unwrap().get(t - 1).unwrap();
    assert_close(&to_vec(&hs), &floats(&f, "out"), "outputs h_t");
    assert_close(
        &to_vec(&hs.get(t - 1).unwrap()),
        &floats(&f, "h_last"),
        "final h",
    );
    assert_close(&to_vec(&c_last), &floats(&f, "c_last"), "final c");
    let w_out = Tensor::from_vec(floats(&f, "w_out"), (t, b, h), &dev).unwrap();
    let w_c = Tensor::from_vec(floats(&f, "w_c"), (b, h), &dev).unwrap();
    let loss = ((hs * w_out).unwrap().sum_all().unwrap()
        + (c_last * w_c).unwrap().sum_all().unwrap())
    .unwrap();
    let want_loss = f["loss"].as_f64().unwrap() as f32;
    assert!((loss.to_scalar::<f32>().unwrap() - want_loss).abs() < 1e-5 * want_loss.abs().max(1.0));
    let g = loss.backward().unwrap();
    for (var, key) in [
        (&w_ih, "grad_weight_ih"),
        (&w_hh, "grad_weight_hh"),
        (&bias, "grad_bias"),
        (&x, "grad_x"),
        (&h0, "grad_h0"),
        (&c0, "grad_c0"),
    ] {
        assert_close(
            &to_vec(g.get(var.as_tensor()).unwrap()),
            &floats(&f, key),
            key,
        );
    }
}
