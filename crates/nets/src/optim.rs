//! Adam with global gradient-norm clipping, updating the network's variables in place.
//!
//! candle has neither plain Adam (its AdamW with weight decay 0 is Adam) nor gradient
//! clipping. This implementation keeps the first and second moments as plain f32 vectors
//! (saved in checkpoints so a run resumes exactly) and writes each update straight into
//! the variable's storage, with no temporary tensors. The update follows Kingma & Ba 2015
//! with PyTorch's placement of epsilon: theta -= lr * m_hat / (sqrt(v_hat) + eps).
//! Clipping follows the usual global-norm rule: if ||g|| > c, g *= c / (||g|| + 1e-6).

use std::cell::RefCell;

use candle_core::backprop::GradStore;
use candle_core::{bail, CpuStorage, InplaceOp1, Layout};

use crate::error::{Error, Result};
use crate::network::Network;
use crate::raw::with_f32;

/// What one optimizer step did.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct StepReport {
    /// Global gradient norm before clipping.
    pub grad_norm: f64,
    /// Whether the gradient was scaled down.
    pub clipped: bool,
}

/// Adam state for one network.
#[derive(Debug, Clone, PartialEq)]
pub struct Optimizer {
    /// beta1 (0.9).
    pub beta1: f64,
    /// beta2 (0.999).
    pub beta2: f64,
    /// epsilon added to sqrt(v_hat).
    pub eps: f64,
    /// Global gradient-norm clip (0 = off).
    pub clip: f64,
    /// Steps taken.
    pub t: u64,
    /// Parameter names, in the network's order.
    pub names: Vec<String>,
    /// First moments, per parameter.
    pub m: Vec<Vec<f32>>,
    /// Second moments, per parameter.
    pub v: Vec<Vec<f32>>,
}

struct AdamUpdate<'a> {
    grad: &'a [f32],
    scale: f32,
    m: RefCell<&'a mut [f32]>,
    v: RefCell<&'a mut [f32]>,
    b1: f32,
    b2: f32,
    step_size: f32,
    eps_hat: f32,
    bias2_sqrt: f32,
}

impl InplaceOp1 for AdamUpdate<'_> {
    fn name(&self) -> &'static str {
        "adam-update"
    }

    fn cpu_fwd(&self, storage: &mut CpuStorage, layout: &Layout) -> candle_core::Result<()> {
        let CpuStorage::F32(p) = storage else {
            bail!("adam: parameters must be f32")
        };
        let Some((a, b)) = layout.contiguous_offsets() else {
            bail!("adam: parameters must be contiguous")
        };
        let p = &mut p[a..b];
        let mut m = self.m.borrow_mut();
        let mut v = self.v.borrow_mut();
        if p.len() != self.grad.len() || m.len() != p.len() {
            bail!(
                "adam: parameter of {} values, gradient of {}",
                p.len(),
                self.grad.len()
            );
        }
        let (b1, b2, s) = (self.b1, self.b2, self.scale);
        for i in 0..p.len() {
            let g = self.grad[i] * s;
            let mi = b1 * m[i] + (1.0 - b1) * g;
            let vi = b2 * v[i] + (1.0 - b2) * g * g;
            m[i] = mi;
            v[i] = vi;
            // lr * m_hat / (sqrt(v_hat) + eps), with step_size = lr / (1 - b1^t)
            p[i] -= self.step_size * mi / (vi.sqrt() / self.bias2_sqrt + self.eps_hat);
        }
        Ok(())
    }
}

impl Optimizer {
    /// Fresh Adam state (beta1 0.9, beta2 0.999) for `net`.
    pub fn new(net: &Network, eps: f64, clip: f64) -> Self {
        let vars = net.vars();
        Optimizer {
            beta1: 0.9,
            beta2: 0.999,
            eps,
            clip,
            t: 0,
            names: vars.iter().map(|(n, _)| n.clone()).collect(),
            m: vars
                .iter()
                .map(|(_, v)| vec![0.0; v.elem_count()])
                .collect(),
            v: vars
                .iter()
                .map(|(_, v)| vec![0.0; v.elem_count()])
                .collect(),
        }
    }

    /// Global L2 norm of the gradients of `net`'s variables (missing gradients count as 0).
    pub fn grad_norm(net: &Network, grads: &GradStore) -> Result<f64> {
        let mut sq = 0f64;
        for (_, var) in net.vars() {
            if let Some(g) = grads.get(var.as_tensor()) {
                sq += with_f32(g, |g| {
                    g.iter().map(|x| (*x as f64) * (*x as f64)).sum::<f64>()
                })?;
            }
        }
        Ok(sq.sqrt())
    }

    /// One Adam step with learning rate `lr` over `net`'s variables. Variables without a
    /// gradient (unused in this loss) are left alone, moments included.
    pub fn step(&mut self, net: &Network, grads: &GradStore, lr: f64) -> Result<StepReport> {
        let vars = net.vars();
        if vars.len() != self.names.len() || vars.iter().zip(&self.names).any(|((a, _), b)| a != b)
        {
            return Err(Error::shape(
                "optimizer step",
                "the network the optimizer was made for",
                "a network with other parameters",
            ));
        }
        let grad_norm = Self::grad_norm(net, grads)?;
        if !grad_norm.is_finite() {
            return Err(Error::Spec(format!("non-finite gradient norm {grad_norm}")));
        }
        let clipped = self.clip > 0.0 && grad_norm > self.clip;
        let scale = if clipped {
            self.clip / (grad_norm + 1e-6)
        } else {
            1.0
        };
        self.t += 1;
        let bias1 = 1.0 - self.beta1.powi(self.t as i32);
        let bias2 = 1.0 - self.beta2.powi(self.t as i32);
        for (i, (_, var)) in vars.iter().enumerate() {
            let Some(g) = grads.get(var.as_tensor()) else {
                continue;
            };
            let (m, v) = (&mut self.m[i], &mut self.v[i]);
            with_f32(g, |g| -> Result<()> {
                let op = AdamUpdate {
                    grad: g,
                    scale: scale as f32,
                    m: RefCell::new(m.as_mut_slice()),
                    v: RefCell::new(v.as_mut_slice()),
                    b1: self.beta1 as f32,
                    b2: self.beta2 as f32,
                    step_size: (lr / bias1) as f32,
                    eps_hat: self.eps as f32,
                    bias2_sqrt: bias2.sqrt() as f32,
                };
                var.as_tensor().inplace_op1(&op)?;
                Ok(())
            })??;
        }
        Ok(StepReport { grad_norm, clipped })
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::network::{NetShape, ObsShape};
    use candle_core::Tensor;
    use mnemon_spec::{Activation, AgentSpec, Head, Memory, Torso};

    fn tiny() -> Network {
        let agent = AgentSpec {
            torso: Torso::Mlp {
                layers: vec![3],
                activation: Activation::Relu,
            },
            memory: Memory::None,
            head: Head::Value,
            previous_action_reward: false,
        };
        Network::new(
            &agent,
            NetShape {
                obs: ObsShape::Vector(2),
                actions: 2,
            },
            7,
        )
        .unwrap()
    }

    fn loss(net: &Network) -> Tensor {
        let x = Tensor::new(&[[0.5f32, -1.0], [1.0, 2.0]], &candle_core::Device::Cpu).unwrap();
        let (w, b) = (net.vars()[0].1.as_tensor(), net.vars()[1].1.as_tensor());
        let y = x
            .matmul(&w.t().unwrap())
            .unwrap()
            .broadcast_add(b)
            .unwrap()
            .relu()
            .unwrap();
        let (w2, b2) = (net.vars()[2].1.as_tensor(), net.vars()[3].1.as_tensor());
        y.matmul(&w2.t().unwrap())
            .unwrap()
            .broadcast_add(b2)
            .unwrap()
            .sqr()
            .unwrap()
            .sum_all()
            .unwrap()
    }

    // Reference: candle-nn's AdamW with weight decay 0, which is Adam with the same
    // epsilon placement (Kingma & Ba 2015).
    #[test]
    fn matches_candle_adamw_without_decay() {
        use candle_nn::Optimizer as _;
        let ours = tiny();
        let theirs = tiny();
        let mut opt = Optimizer::new(&ours, 1e-8, 0.0);
        let params = candle_nn::ParamsAdamW {
            lr: 1e-2,
            weight_decay: 0.0,
            ..Default::default()
        };
        let mut adamw = candle_nn::AdamW::new(
            theirs.vars().iter().map(|(_, v)| v.clone()).collect(),
            params,
        )
        .unwrap();
        for _ in 0..5 {
            opt.step(&ours, &loss(&ours).backward().unwrap(), 1e-2)
                .unwrap();
            adamw.step(&loss(&theirs).backward().unwrap()).unwrap();
        }
        for ((n, a), (_, b)) in ours.vars().iter().zip(theirs.vars()) {
            let a = a.flatten_all().unwrap().to_vec1::<f32>().unwrap();
            let b = b.flatten_all().unwrap().to_vec1::<f32>().unwrap();
            for (x, y) in a.iter().zip(&b) {
                assert!((x - y).abs() < 1e-6, "{n}: {x} vs {y}");
            }
        }
    }

    // Analytic fact: the first Adam step moves every parameter by lr * sign(g) (when
    // |g| >> eps), whatever the gradient's size; clipping changes the reported norm only.
    #[test]
    fn first_step_is_sign_and_clip_reports_norm() {
        let net = tiny();
        let before = net.snapshot().unwrap();
        let grads = loss(&net).backward().unwrap();
        let norm = Optimizer::grad_norm(&net, &grads).unwrap();
        let mut opt = Optimizer::new(&net, 1e-8, norm / 10.0);
        let r = opt.step(&net, &grads, 0.1).unwrap();
        assert!(r.clipped && (r.grad_norm - norm).abs() < 1e-9);
        let after = net.snapshot().unwrap();
        for (i, (_, var)) in net.vars().iter().enumerate() {
            let g = grads
                .get(var.as_tensor())
                .unwrap()
                .flatten_all()
                .unwrap()
                .to_vec1::<f32>()
                .unwrap();
            for (j, gj) in g.iter().enumerate() {
                let d = after.tensors[i].2[j] - before.tensors[i].2[j];
                if gj.abs() > 1e-4 {
                    assert!(
                        (d + 0.1 * gj.signum()).abs() < 1e-4,
                        "step {d} for gradient {gj}"
                    );
                }
            }
        }
    }
}
