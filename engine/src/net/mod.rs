//! Networks of the controller: import from ONNX ([`load_onnx`]), an f64 forward pass
//! ([`Network::eval`]) and sound bounds on the outputs over a box of inputs
//! ([`output_bounds`]).
//!
//! A [`Network`] is a chain of layers — affine maps ([`Layer::Dense`]) and
//! element-wise activations — normalised from the ONNX graph. Its weights are f64
//! numbers taken as exact reals: the network *is* the real-arithmetic function of those
//! weights. Import never rounds a weight: affine operators are merged only when the
//! merged weights are exactly representable (checked with error-free transformations),
//! and otherwise kept as separate layers. Float32 weights convert to f64 exactly.
//! [`Network::eval`] approximates that function in f64; [`output_bounds`] encloses it
//! rigorously, floating-point rounding included.

pub mod bounds;
pub mod onnx;
pub mod proto;
pub mod slopes;

pub use bounds::{output_bounds, OutputBounds};
pub use onnx::{load_onnx, NetError};

use super::spec::NetworkShape;
use ndarray::{Array1, Array2};
use sha2::{Digest, Sha256};

/// One layer of the normalised chain.
#[derive(Clone, Debug, PartialEq)]
pub enum Layer {
    /// `z = w·a + b`, with `w` of shape (outputs, inputs).
    Dense { w: Array2<f64>, b: Array1<f64> },
    /// `max(z, 0)` element-wise.
    Relu,
    /// `1 / (1 + e^(−z))` element-wise.
    Sigmoid,
    /// `tanh z` element-wise.
    Tanh,
}

/// A feed-forward network: a chain of [`Layer`]s from a vector of `input_dim` reals.
#[derive(Clone, Debug, PartialEq)]
pub struct Network {
    input_dim: usize,
    layers: Vec<Layer>,
    float32: bool,
}

impl Network {
    /// A network from its layers. Checks that every dense layer takes as many inputs
    /// as the layer before it gives and that every weight is finite; the error names
    /// the layer by its index.
    pub fn new(input_dim: usize, layers: Vec<Layer>, float32: bool) -> Result<Network, NetError> {
        let mut dim = input_dim;
        for (k, layer) in layers.iter().enumerate() {
            if let Layer::Dense { w, b } = layer {
                let label = format!("layer {k} (Dense)");
                if w.ncols() != dim {
                    return Err(NetError::Shape {
                        node: label,
                        detail: format!("weights take {} inputs but the layer receives {dim}", w.ncols()),
                    });
                }
                if b.len() != w.nrows() {
                    return Err(NetError::Shape {
                        node: label,
                        detail: format!("bias has {} entries for {} outputs", b.len(), w.nrows()),
                    });
                }
                if !w.iter().chain(b.iter()).all(|v| v.is_finite()) {
                    return Err(NetError::Invalid { node: label, detail: "a weight is NaN or infinite".into() });
                }
                dim = w.nrows();
            }
        }
        Ok(Network { input_dim, layers, float32 })
    }

    /// Number of inputs.
    pub fn input_dim(&self) -> usize {
        self.input_dim
    }

    /// Number of outputs.
    pub fn output_dim(&self) -> usize {
        self.layers
            .iter()
            .rev()
            .find_map(|l| match l {
                Layer::Dense { w, .. } => Some(w.nrows()),
                _ => None,
            })
            .unwrap_or(self.input_dim)
    }

    /// Input and output counts, for checking against a campaign spec.
    pub fn shape(&self) -> NetworkShape {
        NetworkShape { inputs: self.input_dim(), outputs: self.output_dim() }
    }

    /// The normalised layers, first to last.
    pub fn layers(&self) -> &[Layer] {
        &self.layers
    }

    /// Whether the model computed in float32 (its input was declared FLOAT). The
    /// weights are still exact here; the deployed float32 arithmetic differs from the
    /// real-arithmetic network by rounding, which callers may need to account for.
    pub fn is_float32(&self) -> bool {
        self.float32
    }

    /// The forward pass in f64 arithmetic: an approximation of the network's value
    /// (not a bound — use [`output_bounds`] to prove anything).
    ///
    /// Panics if `x.len() != self.input_dim()` (a caller's error, not bad input data).
    pub fn eval(&self, x: &[f64]) -> Vec<f64> {
        assert_eq!(x.len(), self.input_dim, "network takes {} inputs, got {}", self.input_dim, x.len());
        let mut a = Array1::from(x.to_vec());
        for layer in &self.layers {
            match layer {
                Layer::Dense { w, b } => a = w.dot(&a) + b,
                Layer::Relu => a.mapv_inplace(|v| v.max(0.0)),
                Layer::Sigmoid => a.mapv_inplace(|v| 1.0 / (1.0 + (-v).exp())),
                Layer::Tanh => a.mapv_inplace(f64::tanh),
            }
        }
        a.to_vec()
    }
}

/// Lower-case hex SHA-256 of `bytes` (models are addressed by the hash of their file).
pub fn sha256_hex(bytes: &[u8]) -> String {
    hex::encode(Sha256::digest(bytes))
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    #[test]
    fn sha256_of_abc_matches_the_standard_example() {
        // SHA-256("abc"): FIPS 180-4, one-block example of NIST's published example values.
        assert_eq!(sha256_hex(b"abc"), "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad");
    }

    #[test]
    fn new_checks_dimensions_and_names_the_layer() {
        let bad = Network::new(3, vec![Layer::Dense { w: Array2::zeros((2, 2)), b: Array1::zeros(2) }], false);
        let e = bad.unwrap_err().to_string();
        assert!(e.contains("layer 0"), "{e}");
        let nan = Network::new(1, vec![Layer::Dense { w: array![[f64::NAN]], b: array![0.0] }], false);
        assert!(nan.is_err());
    }

    #[test]
    fn eval_small_network_by_hand() {
        // y = relu([1 -1; 2 0]·x + [0, -1]) summed: at x = (3, 1): z = (2, 5), y = 7.
        let net = Network::new(
            2,
            vec![
                Layer::Dense { w: array![[1.0, -1.0], [2.0, 0.0]], b: array![0.0, -1.0] },
                Layer::Relu,
                Layer::Dense { w: array![[1.0, 1.0]], b: array![0.0] },
            ],
            false,
        )
        .unwrap();
        assert_eq!(net.eval(&[3.0, 1.0]), vec![7.0]);
        assert_eq!(net.shape(), NetworkShape { inputs: 2, outputs: 1 });
    }
}
