//! The network's forward pass on plain slices, for the prediction endpoint's
//! small requests. A request of one row through burn pays for tensor set-up,
//! dispatch and allocation on every layer, which is most of its cost; here a
//! 64-64 network is a few thousand multiply-adds on weights copied out of
//! the checkpoint once, when the model is loaded.
//!
//! The values equal burn's forward pass up to rounding: sums are accumulated
//! in f64 and rounded to f32 after each layer, so they are at least as close
//! to the exact value as burn's f32 sums (a unit test compares the two).

use crate::config::Activation;

use super::LayerWeights;

/// A network's layers as plain row-major matrices.
#[derive(Debug, Clone)]
pub struct DirectNet {
    layers: Vec<LayerWeights>,
    activation: Activation,
}

impl DirectNet {
    pub fn new(layers: Vec<LayerWeights>, activation: Activation) -> DirectNet {
        DirectNet { layers, activation }
    }

    /// Inputs one row takes.
    pub fn width(&self) -> usize {
        self.layers.first().map_or(0, |l| l.inputs)
    }

    /// Raw outputs of every row of `features` (row-major, `width()` values a
    /// row), appended to `out`.
    pub fn forward(&self, features: &[f32], out: &mut Vec<f32>) {
        let width = self.width();
        if width == 0 {
            return;
        }
        let last = self.layers.len() - 1;
        let mut h: Vec<f32> = Vec::new();
        let mut next: Vec<f32> = Vec::new();
        let mut acc: Vec<f64> = Vec::new();
        for row in features.chunks_exact(width) {
            h.clear();
            h.extend_from_slice(row);
            for (i, layer) in self.layers.iter().enumerate() {
                next.clear();
                next.resize(layer.outputs, 0.0);
                acc.clear();
                acc.resize(layer.outputs, 0.0);
                for (x, weights) in h.iter().zip(layer.weight.chunks_exact(layer.outputs)) {
                    let x = f64::from(*x);
                    if x == 0.0 {
                        // One-hot inputs are mostly zero.
                        continue;
                    }
                    for (a, w) in acc.iter_mut().zip(weights) {
                        *a += x * f64::from(*w);
                    }
                }
                for ((n, a), b) in next.iter_mut().zip(&acc).zip(&layer.bias) {
                    let v = (a + f64::from(*b)) as f32;
                    *n = if i < last {
                        activate(self.activation, v)
                    } else {
                        v
                    };
                }
                std::mem::swap(&mut h, &mut next);
            }
            out.extend_from_slice(&h);
        }
    }
}

fn activate(kind: Activation, x: f32) -> f32 {
    match kind {
        Activation::Relu => x.max(0.0),
        Activation::Tanh => x.tanh(),
        Activation::Sigmoid => 1.0 / (1.0 + (-x).exp()),
    }
}
