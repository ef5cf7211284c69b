//! Import of feed-forward ONNX models into a [`Network`].
//!
//! Supported (default domain): `Gemm` (alpha, beta, transA, transB), `MatMul`, `Add`,
//! `Sub`, `Relu`, `Sigmoid`, `Tanh`, `Flatten`, `Reshape`, `Identity`, `Constant`;
//! constant tensors of type FLOAT or DOUBLE (INT32/INT64 only as `Reshape` shapes),
//! stored as `raw_data` or in the typed fields. The graph has one input and one output;
//! a symbolic first dimension of the input is a batch size and is taken as 1.
//!
//! Only the nodes the output depends on are imported. Every value computed from the
//! input is tracked as "the chain of steps from the input" plus its tensor shape; the
//! flattening of a tensor in row-major order (what `Reshape` and `Flatten` preserve) is
//! the feature vector the chain acts on. Affine operators become matrices over those
//! features; an `Add`/`Sub` of a constant (and the `alpha`/`beta` scaling of `Gemm`) is
//! merged into the preceding affine step only when the merged numbers are exact
//! (checked with error-free transformations), so import never rounds the network.
//!
//! Errors name the node: by its name when it has one, otherwise by op type and index.
//! No input bytes can make the importer panic; sizes are checked before allocating.

use super::proto::{self, attribute_type, data_type, AttributeProto, ModelProto, NodeProto, TensorProto, ValueInfoProto};
use super::{Layer, Network};
use ndarray::{Array1, Array2};
use prost::Message;
use std::collections::HashMap;
use std::rc::Rc;

/// Why a model could not be imported. Every message names the node or tensor at fault.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
pub enum NetError {
    #[error("not an ONNX model: {0}")]
    Decode(String),
    #[error("empty graph: {0}")]
    EmptyGraph(String),
    #[error("the graph must have exactly one input besides its initializers, but it has {count}{names}")]
    InputCount { count: usize, names: String },
    #[error("the graph must have exactly one output, but it has {count}{names}")]
    OutputCount { count: usize, names: String },
    #[error("node {node}: unsupported operator {op}{detail}")]
    Unsupported { node: String, op: String, detail: String },
    #[error("node {node}: tensor '{tensor}' has data type {dtype}, but only FLOAT and DOUBLE tensors can be weights")]
    NonFloat { node: String, tensor: String, dtype: String },
    #[error("node {node} is part of a cycle: the graph is not feed-forward")]
    Cycle { node: String },
    #[error("node {node}: shape mismatch: {detail}")]
    Shape { node: String, detail: String },
    #[error("node {node}: input '{input}' is produced by no node, initializer or graph input")]
    MissingInput { node: String, input: String },
    #[error("node {node}: {detail}")]
    Invalid { node: String, detail: String },
    #[error("tensor '{tensor}': {detail}")]
    BadTensor { tensor: String, detail: String },
}

/// Most elements of one tensor or matrix the importer will allocate (128 MiB of f64).
const MAX_ELEMENTS: usize = 1 << 24;
/// Most matrix elements of one import in total (512 MiB of f64).
const MAX_TOTAL_ELEMENTS: usize = 1 << 26;

/// Decode an ONNX model and normalise it into a [`Network`].
///
/// Guarantee: the returned network computes, in real arithmetic, exactly the function
/// the model's graph defines in real arithmetic on its (float32 or float64) weights.
pub fn load_onnx(bytes: &[u8]) -> Result<Network, NetError> {
    let model = ModelProto::decode(bytes).map_err(|e| NetError::Decode(e.to_string()))?;
    let graph = model.graph.ok_or_else(|| NetError::EmptyGraph("the model has no graph".into()))?;
    if graph.node.is_empty() {
        return Err(NetError::EmptyGraph("the graph has no nodes".into()));
    }
    Importer::new(&graph)?.run()
}

// ---------------------------------------------------------------------------
// Values during import
// ---------------------------------------------------------------------------

#[derive(Clone, Debug)]
enum Data {
    /// FLOAT or DOUBLE values (exact in f64) and whether they were float32.
    Float(Vec<f64>, bool),
    /// INT32 or INT64 values (the code says which): only for shapes.
    Int(Vec<i64>, i32),
    /// Any other data type (its code): usable nowhere.
    Other(i32),
}

#[derive(Clone, Debug)]
struct Tensor {
    name: String,
    dims: Vec<usize>,
    data: Data,
}

/// One step of the chain from the graph input, before normalisation.
#[derive(Clone, Debug)]
enum Step {
    /// `z = w·a + b`.
    Linear { w: Array2<f64>, b: Array1<f64> },
    /// `z = d ∘ a + b` (element-wise), from `Add`, `Sub` and `Gemm` scaling.
    Diag { d: Array1<f64>, b: Array1<f64> },
    Act(Layer),
}

/// The chain of steps, shared between values (a persistent linked list).
#[derive(Debug)]
struct Chain {
    step: Step,
    prev: Option<Rc<Chain>>,
}

/// A value computed from the graph input.
#[derive(Clone, Debug)]
struct Dyn {
    dims: Vec<usize>,
    chain: Option<Rc<Chain>>,
}

impl Dyn {
    fn len(&self) -> usize {
        self.dims.iter().product()
    }
    fn then(&self, step: Step, dims: Vec<usize>) -> Dyn {
        Dyn { dims, chain: Some(Rc::new(Chain { step, prev: self.chain.clone() })) }
    }
}

#[derive(Clone, Debug)]
enum Value {
    Const(Rc<Tensor>),
    Dyn(Dyn),
}

/// Product of dimensions, `None` on overflow or beyond [`MAX_ELEMENTS`].
fn checked_count(dims: &[usize]) -> Option<usize> {
    let mut n: usize = 1;
    for &d in dims {
        n = n.checked_mul(d)?;
    }
    (n <= MAX_ELEMENTS).then_some(n)
}

/// The graph output's declared size, when it declares one, must be the size the nodes
/// compute: a reader that trusted the nodes alone would give a model declared with 3
/// outputs (one per command) 195 outputs instead, found by fuzzing with a transposed
/// batch input. Only the element count is compared (exporters differ on a leading batch
/// dimension of 1); a symbolic leading dimension counts as 1, as for the input, and
/// any other symbolic dimension, or none at all, leaves the size undeclared.
fn check_declared_output(out: &ValueInfoProto, computed: &Dyn) -> Result<(), NetError> {
    let Some(shape) = out.r#type.as_ref().and_then(|t| t.tensor_type.as_ref()).and_then(|t| t.shape.as_ref()) else {
        return Ok(());
    };
    // An empty dimension list is read as "not declared" (as some writers leave it),
    // not as a scalar.
    if shape.dim.is_empty() {
        return Ok(());
    }
    let mut declared: Vec<usize> = Vec::new();
    for (k, d) in shape.dim.iter().enumerate() {
        match &d.value {
            Some(proto::DimensionValue::DimValue(v)) if *v >= 0 => declared.push(*v as usize),
            Some(proto::DimensionValue::DimParam(_)) | None if k == 0 => declared.push(1),
            _ => return Ok(()),
        }
    }
    let count = declared.iter().try_fold(1usize, |n, &d| n.checked_mul(d));
    if count != Some(computed.len()) {
        return Err(NetError::Shape {
            node: format!("graph output '{}'", out.name),
            detail: format!("declared as {declared:?}, but the nodes compute {:?}", computed.dims),
        });
    }
    Ok(())
}

fn node_label(node: &NodeProto, index: usize) -> String {
    if node.name.is_empty() {
        format!("{} #{index}", node.op_type)
    } else {
        format!("'{}' ({})", node.name, node.op_type)
    }
}

fn names_suffix<'a>(names: impl Iterator<Item = &'a str>) -> String {
    let v: Vec<String> = names.map(|n| format!("'{n}'")).collect();
    if v.is_empty() {
        String::new()
    } else {
        format!(": {}", v.join(", "))
    }
}

// ---------------------------------------------------------------------------
// Tensors
// ---------------------------------------------------------------------------

fn decode_tensor(t: &TensorProto, name: &str) -> Result<Tensor, NetError> {
    let bad = |detail: String| NetError::BadTensor { tensor: name.to_string(), detail };
    if t.data_location == 1 {
        return Err(bad("data stored in an external file is not supported".into()));
    }
    let mut dims = Vec::with_capacity(t.dims.len());
    for &d in &t.dims {
        if d < 0 {
            return Err(bad(format!("negative dimension {d}")));
        }
        dims.push(usize::try_from(d).map_err(|_| bad(format!("dimension {d} is too large")))?);
    }
    let n = checked_count(&dims).ok_or_else(|| bad(format!("too many elements (dims {:?})", t.dims)))?;
    let raw = &t.raw_data;
    let expect = |have: usize, what: &str| -> Result<(), NetError> {
        if have == n {
            Ok(())
        } else {
            Err(bad(format!("dims {:?} need {n} values but {what} holds {have}", t.dims)))
        }
    };
    let data = match t.data_type {
        data_type::FLOAT | data_type::DOUBLE => {
            let is_f32 = t.data_type == data_type::FLOAT;
            let values: Vec<f64> = if !raw.is_empty() {
                let size = if is_f32 { 4 } else { 8 };
                if raw.len() % size != 0 {
                    return Err(bad(format!("raw_data has {} bytes, not a multiple of {size}", raw.len())));
                }
                expect(raw.len() / size, "raw_data")?;
                if is_f32 {
                    raw.chunks_exact(4).map(|c| f32::from_le_bytes([c[0], c[1], c[2], c[3]]) as f64).collect()
                } else {
                    raw.chunks_exact(8)
                        .map(|c| f64::from_le_bytes([c[0], c[1], c[2], c[3], c[4], c[5], c[6], c[7]]))
                        .collect()
                }
            } else if is_f32 {
                expect(t.float_data.len(), "float_data")?;
                t.float_data.iter().map(|&v| v as f64).collect()
            } else {
                expect(t.double_data.len(), "double_data")?;
                t.double_data.clone()
            };
            if values.iter().any(|v| !v.is_finite()) {
                return Err(bad("holds a NaN or infinite value".into()));
            }
            Data::Float(values, is_f32)
        }
        data_type::INT64 => {
            let values: Vec<i64> = if !raw.is_empty() {
                if raw.len() % 8 != 0 {
                    return Err(bad(format!("raw_data has {} bytes, not a multiple of 8", raw.len())));
                }
                expect(raw.len() / 8, "raw_data")?;
                raw.chunks_exact(8)
                    .map(|c| i64::from_le_bytes([c[0], c[1], c[2], c[3], c[4], c[5], c[6], c[7]]))
                    .collect()
            } else {
                expect(t.int64_data.len(), "int64_data")?;
                t.int64_data.clone()
            };
            Data::Int(values, data_type::INT64)
        }
        data_type::INT32 => {
            let values: Vec<i64> = if !raw.is_empty() {
                if raw.len() % 4 != 0 {
                    return Err(bad(format!("raw_data has {} bytes, not a multiple of 4", raw.len())));
                }
                expect(raw.len() / 4, "raw_data")?;
                raw.chunks_exact(4).map(|c| i32::from_le_bytes([c[0], c[1], c[2], c[3]]) as i64).collect()
            } else {
                expect(t.int32_data.len(), "int32_data")?;
                t.int32_data.iter().map(|&v| v as i64).collect()
            };
            Data::Int(values, data_type::INT32)
        }
        other => Data::Other(other),
    };
    Ok(Tensor { name: name.to_string(), dims, data })
}

// ---------------------------------------------------------------------------
// Exactness checks (error-free transformations)
// ---------------------------------------------------------------------------

/// Below this magnitude a product's rounding error may itself be lost to underflow,
/// so the FMA residual test no longer proves exactness.
const SAFE_PRODUCT_MIN: f64 = 1.0e-290;

/// `a·b` if it is exactly representable, else `None`. The FMA gives the exact residual
/// `a·b − fl(a·b)` (one rounding of an exactly representable number) when no underflow
/// occurs, so a zero residual proves exactness.
fn exact_mul(a: f64, b: f64) -> Option<f64> {
    if a == 0.0 || b == 0.0 {
        return Some(0.0);
    }
    if a == 1.0 {
        return Some(b);
    }
    if a == -1.0 {
        return Some(-b);
    }
    let p = a * b;
    if !p.is_finite() || p.abs() < SAFE_PRODUCT_MIN {
        return None;
    }
    (a.mul_add(b, -p) == 0.0).then_some(p)
}

/// `a + b` if it is exactly representable, else `None` (Knuth's TwoSum residual,
/// error-free for all finite inputs).
fn exact_add(a: f64, b: f64) -> Option<f64> {
    let s = a + b;
    if !s.is_finite() {
        return None;
    }
    let bb = s - a;
    let err = (a - (s - bb)) + (b - bb);
    (err == 0.0).then_some(s)
}

/// `a·b` split as `hi + lo` exactly (FMA TwoProduct), or `None` where underflow could
/// make the split inexact.
fn split_mul(a: f64, b: f64) -> Option<(f64, f64)> {
    if let Some(p) = exact_mul(a, b) {
        return Some((p, 0.0));
    }
    let p = a * b;
    if !p.is_finite() || p.abs() < SAFE_PRODUCT_MIN {
        return None;
    }
    Some((p, a.mul_add(b, -p)))
}

/// `diag(d2)·(diag(d1)·a + b1) + b2` as one diagonal step, if exact.
fn fold_diag_diag(d1: &Array1<f64>, b1: &Array1<f64>, d2: &Array1<f64>, b2: &Array1<f64>) -> Option<Step> {
    let mut d = Array1::zeros(d1.len());
    let mut b = Array1::zeros(d1.len());
    for i in 0..d1.len() {
        d[i] = exact_mul(d2[i], d1[i])?;
        b[i] = exact_add(exact_mul(d2[i], b1[i])?, b2[i])?;
    }
    Some(Step::Diag { d, b })
}

/// `diag(d)·(w·a + b1) + b2` as one linear step, if exact.
fn fold_linear_diag(w: &Array2<f64>, b1: &Array1<f64>, d: &Array1<f64>, b2: &Array1<f64>) -> Option<Step> {
    let mut w2 = w.clone();
    for (i, mut row) in w2.rows_mut().into_iter().enumerate() {
        if d[i] != 1.0 {
            for v in row.iter_mut() {
                *v = exact_mul(d[i], *v)?;
            }
        }
    }
    let mut b = Array1::zeros(b1.len());
    for i in 0..b1.len() {
        b[i] = exact_add(exact_mul(d[i], b1[i])?, b2[i])?;
    }
    Some(Step::Linear { w: w2, b })
}

/// The chain as layers: exact merges of diagonal steps into the step before, identity
/// steps dropped, remaining diagonal steps written as diagonal matrices.
fn normalise(chain: &Option<Rc<Chain>>) -> Vec<Layer> {
    let mut steps = Vec::new();
    let mut cur = chain.clone();
    while let Some(c) = cur {
        steps.push(c.step.clone());
        cur = c.prev.clone();
    }
    steps.reverse();
    let mut out: Vec<Step> = Vec::new();
    for step in steps {
        if let Step::Diag { d, b } = &step {
            if d.iter().all(|&v| v == 1.0) && b.iter().all(|&v| v == 0.0) {
                continue; // the identity
            }
            let merged = match out.last() {
                Some(Step::Linear { w, b: b1 }) => fold_linear_diag(w, b1, d, b),
                Some(Step::Diag { d: d1, b: b1 }) => fold_diag_diag(d1, b1, d, b),
                _ => None,
            };
            if let Some(m) = merged {
                *out.last_mut().expect("merged with a last step") = m;
                continue;
            }
        }
        out.push(step);
    }
    out.into_iter()
        .map(|s| match s {
            Step::Linear { w, b } => Layer::Dense { w, b },
            Step::Diag { d, b } => Layer::Dense { w: Array2::from_diag(&d), b },
            Step::Act(l) => l,
        })
        .collect()
}

// ---------------------------------------------------------------------------
// The graph walk
// ---------------------------------------------------------------------------

struct Importer<'g> {
    graph: &'g proto::GraphProto,
    values: HashMap<String, Value>,
    producer: HashMap<&'g str, usize>,
    input_dim: usize,
    float32: bool,
    /// Matrix elements allocated so far.
    allocated: usize,
}

impl<'g> Importer<'g> {
    fn new(graph: &'g proto::GraphProto) -> Result<Importer<'g>, NetError> {
        let mut values = HashMap::new();
        let mut float32 = false;
        for init in &graph.initializer {
            let t = decode_tensor(init, &init.name)?;
            if values.insert(init.name.clone(), Value::Const(Rc::new(t))).is_some() {
                return Err(NetError::BadTensor {
                    tensor: init.name.clone(),
                    detail: "more than one initializer has this name".into(),
                });
            }
        }
        let inputs: Vec<&ValueInfoProto> = graph.input.iter().filter(|i| !values.contains_key(&i.name)).collect();
        if inputs.len() != 1 {
            return Err(NetError::InputCount {
                count: inputs.len(),
                names: names_suffix(inputs.iter().map(|i| i.name.as_str())),
            });
        }
        if graph.output.len() != 1 {
            return Err(NetError::OutputCount {
                count: graph.output.len(),
                names: names_suffix(graph.output.iter().map(|o| o.name.as_str())),
            });
        }
        let input = inputs[0];
        let label = format!("graph input '{}'", input.name);
        let invalid = |detail: &str| NetError::Invalid { node: label.clone(), detail: detail.to_string() };
        let tensor = input
            .r#type
            .as_ref()
            .and_then(|t| t.tensor_type.as_ref())
            .ok_or_else(|| invalid("is not declared as a tensor"))?;
        match tensor.elem_type {
            data_type::FLOAT => float32 = true,
            data_type::DOUBLE => {}
            other => {
                return Err(NetError::NonFloat {
                    node: label.clone(),
                    tensor: input.name.clone(),
                    dtype: data_type::name(other).into(),
                })
            }
        }
        let shape = tensor.shape.as_ref().ok_or_else(|| invalid("has no declared shape; its size must be fixed"))?;
        let mut dims = Vec::new();
        for (k, d) in shape.dim.iter().enumerate() {
            match &d.value {
                Some(proto::DimensionValue::DimValue(v)) if *v > 0 && (*v as u64) <= MAX_ELEMENTS as u64 => {
                    dims.push(*v as usize)
                }
                // A symbolic or unknown leading dimension is the batch size: one sample.
                Some(proto::DimensionValue::DimParam(_)) | None if k == 0 => dims.push(1),
                _ => return Err(invalid(&format!("dimension {k} must be a fixed positive size"))),
            }
        }
        let input_dim = checked_count(&dims).ok_or_else(|| invalid("has too many elements"))?;
        values.insert(input.name.clone(), Value::Dyn(Dyn { dims, chain: None }));

        let mut producer = HashMap::new();
        for (i, node) in graph.node.iter().enumerate() {
            for out in node.output.iter().filter(|o| !o.is_empty()) {
                if values.contains_key(out) || producer.insert(out.as_str(), i).is_some() {
                    return Err(NetError::Invalid {
                        node: node_label(node, i),
                        detail: format!("value '{out}' is defined more than once"),
                    });
                }
            }
        }
        Ok(Importer { graph, values, producer, input_dim, float32, allocated: 0 })
    }

    /// Nodes the graph output depends on, in an order where producers come first.
    /// Depth-first with an explicit stack (no recursion on untrusted depth).
    fn needed_nodes(&self, output: &str) -> Result<Vec<usize>, NetError> {
        const UNSEEN: u8 = 0;
        const OPEN: u8 = 1;
        const DONE: u8 = 2;
        let nodes = &self.graph.node;
        let mut state = vec![UNSEEN; nodes.len()];
        let mut order = Vec::new();
        let Some(&root) = self.producer.get(output) else {
            return Err(if self.values.contains_key(output) {
                NetError::EmptyGraph(format!("the output '{output}' is not computed by any node"))
            } else {
                NetError::MissingInput { node: "graph output".into(), input: output.into() }
            });
        };
        let mut stack: Vec<(usize, usize)> = vec![(root, 0)];
        state[root] = OPEN;
        while let Some(top) = stack.last_mut() {
            let (n, next) = *top;
            let node = &nodes[n];
            if next < node.input.len() {
                top.1 += 1;
                let name = &node.input[next];
                if name.is_empty() {
                    continue; // an omitted optional input
                }
                match self.producer.get(name.as_str()) {
                    Some(&p) => match state[p] {
                        UNSEEN => {
                            state[p] = OPEN;
                            stack.push((p, 0));
                        }
                        OPEN => return Err(NetError::Cycle { node: node_label(&nodes[p], p) }),
                        _ => {}
                    },
                    None if self.values.contains_key(name) => {}
                    None => {
                        return Err(NetError::MissingInput { node: node_label(node, n), input: name.clone() })
                    }
                }
            } else {
                state[n] = DONE;
                order.push(n);
                stack.pop();
            }
        }
        Ok(order)
    }

    fn run(mut self) -> Result<Network, NetError> {
        let output = self.graph.output[0].name.clone();
        for n in self.needed_nodes(&output)? {
            let node = &self.graph.node[n];
            let label = node_label(node, n);
            let value = self.apply(node, &label)?;
            let Some(out) = node.output.first().filter(|o| !o.is_empty()) else {
                return Err(NetError::Invalid { node: label, detail: "has no output".into() });
            };
            if node.output.iter().skip(1).any(|o| !o.is_empty()) {
                return Err(NetError::Invalid { node: label, detail: "must have exactly one output".into() });
            }
            self.values.insert(out.clone(), value);
        }
        let Some(Value::Dyn(d)) = self.values.get(&output) else {
            return Err(NetError::EmptyGraph(format!("the output '{output}' does not depend on the input")));
        };
        check_declared_output(&self.graph.output[0], d)?;
        let layers = normalise(&d.chain);
        let float32 = self.float32;
        Network::new(self.input_dim, layers, float32)
    }

    fn input<'a>(&'a self, node: &NodeProto, label: &str, k: usize) -> Result<Option<&'a Value>, NetError> {
        match node.input.get(k) {
            None => Ok(None),
            Some(name) if name.is_empty() => Ok(None),
            Some(name) => self
                .values
                .get(name)
                .map(Some)
                .ok_or_else(|| NetError::MissingInput { node: label.into(), input: name.clone() }),
        }
    }

    fn required<'a>(&'a self, node: &NodeProto, label: &str, k: usize) -> Result<&'a Value, NetError> {
        self.input(node, label, k)?.ok_or_else(|| NetError::Invalid {
            node: label.into(),
            detail: format!("needs input number {}", k + 1),
        })
    }

    /// The floats of a constant, noting whether the model uses float32 weights.
    fn floats<'a>(&mut self, t: &'a Tensor, label: &str) -> Result<&'a [f64], NetError> {
        match &t.data {
            Data::Float(v, is_f32) => {
                self.float32 |= *is_f32;
                Ok(v)
            }
            Data::Int(_, code) | Data::Other(code) => {
                Err(NetError::NonFloat { node: label.into(), tensor: t.name.clone(), dtype: data_type::name(*code).into() })
            }
        }
    }

    fn apply(&mut self, node: &NodeProto, label: &str) -> Result<Value, NetError> {
        if !(node.domain.is_empty() || node.domain == "ai.onnx") {
            return Err(NetError::Unsupported {
                node: label.into(),
                op: format!("{}::{}", node.domain, node.op_type),
                detail: " (only the default ONNX domain is supported)".into(),
            });
        }
        let allowed: &[&str] = match node.op_type.as_str() {
            "Gemm" => &["alpha", "beta", "transA", "transB", "broadcast"],
            "MatMul" | "Identity" | "Sigmoid" | "Tanh" | "Relu" => &["consumed_inputs"],
            "Add" | "Sub" => &["broadcast", "consumed_inputs"],
            "Flatten" => &["axis"],
            "Reshape" => &["allowzero"],
            "Constant" => &["value", "value_float", "value_floats", "value_int", "value_ints"],
            other => {
                return Err(NetError::Unsupported { node: label.into(), op: other.into(), detail: String::new() });
            }
        };
        if let Some(a) = node.attribute.iter().find(|a| !allowed.contains(&a.name.as_str())) {
            return Err(NetError::Unsupported {
                node: label.into(),
                op: node.op_type.clone(),
                detail: format!(" with attribute '{}'", a.name),
            });
        }
        match node.op_type.as_str() {
            "Identity" => Ok(self.required(node, label, 0)?.clone()),
            "Relu" | "Sigmoid" | "Tanh" => {
                let layer = match node.op_type.as_str() {
                    "Relu" => Layer::Relu,
                    "Sigmoid" => Layer::Sigmoid,
                    _ => Layer::Tanh,
                };
                let x = self.dynamic(node, label, 0)?;
                Ok(Value::Dyn(x.then(Step::Act(layer), x.dims.clone())))
            }
            "Flatten" => {
                let x = self.required(node, label, 0)?.clone();
                let dims = dims_of(&x);
                let rank = dims.len() as i64;
                let axis = attr_int(node, label, "axis", 1)?;
                let axis = if axis < 0 { axis + rank } else { axis };
                if !(0..=rank).contains(&axis) {
                    return Err(NetError::Invalid {
                        node: label.into(),
                        detail: format!("axis {axis} is out of range for rank {rank}"),
                    });
                }
                let (a, b) = dims.split_at(axis as usize);
                Ok(with_dims(x, vec![a.iter().product(), b.iter().product()]))
            }
            "Reshape" => self.reshape(node, label),
            "Add" | "Sub" => self.add_sub(node, label),
            "MatMul" => self.matmul(node, label),
            "Gemm" => self.gemm(node, label),
            "Constant" => self.constant(node, label),
            _ => unreachable!("operator list checked above"),
        }
    }

    /// A zero matrix, or an error naming the node if it, or all matrices of the import
    /// together, would be too large (a hostile model must not exhaust memory).
    fn sized(&mut self, rows: usize, cols: usize, label: &str) -> Result<Array2<f64>, NetError> {
        match rows.checked_mul(cols) {
            Some(n) if n <= MAX_ELEMENTS && self.allocated + n <= MAX_TOTAL_ELEMENTS => {
                self.allocated += n;
                Ok(Array2::zeros((rows, cols)))
            }
            _ => Err(NetError::Invalid { node: label.into(), detail: format!("needs a {rows}×{cols} matrix: too large") }),
        }
    }

    fn dynamic(&self, node: &NodeProto, label: &str, k: usize) -> Result<Dyn, NetError> {
        match self.required(node, label, k)? {
            Value::Dyn(d) => Ok(d.clone()),
            Value::Const(_) => Err(NetError::Invalid {
                node: label.into(),
                detail: "computes from constants only; constant folding is not supported".into(),
            }),
        }
    }

    fn constant(&mut self, node: &NodeProto, label: &str) -> Result<Value, NetError> {
        let [a] = node.attribute.as_slice() else {
            return Err(NetError::Invalid { node: label.into(), detail: "needs exactly one value attribute".into() });
        };
        let name = node.output.first().cloned().unwrap_or_default();
        let t = match a.name.as_str() {
            "value" => {
                let t = a.t.as_ref().ok_or_else(|| NetError::Invalid {
                    node: label.into(),
                    detail: "attribute 'value' holds no tensor".into(),
                })?;
                decode_tensor(t, &name)?
            }
            "value_float" => Tensor { name, dims: vec![], data: Data::Float(vec![a.f as f64], true) },
            "value_floats" => Tensor {
                name,
                dims: vec![a.floats.len()],
                data: Data::Float(a.floats.iter().map(|&v| v as f64).collect(), true),
            },
            "value_int" => Tensor { name, dims: vec![], data: Data::Int(vec![a.i], data_type::INT64) },
            _ => Tensor { name, dims: vec![a.ints.len()], data: Data::Int(a.ints.clone(), data_type::INT64) },
        };
        if let Data::Float(v, _) = &t.data {
            if v.iter().any(|x| !x.is_finite()) {
                return Err(NetError::BadTensor { tensor: t.name, detail: "holds a NaN or infinite value".into() });
            }
        }
        Ok(Value::Const(Rc::new(t)))
    }

    fn reshape(&mut self, node: &NodeProto, label: &str) -> Result<Value, NetError> {
        let x = self.required(node, label, 0)?.clone();
        let shape = match self.required(node, label, 1)? {
            Value::Const(t) => match &t.data {
                Data::Int(v, _) => v.clone(),
                _ => {
                    return Err(NetError::Invalid {
                        node: label.into(),
                        detail: format!("shape tensor '{}' must be INT64", t.name),
                    })
                }
            },
            Value::Dyn(_) => {
                return Err(NetError::Invalid { node: label.into(), detail: "the target shape must be a constant".into() })
            }
        };
        let allowzero = attr_int(node, label, "allowzero", 0)? != 0;
        let dims = dims_of(&x);
        let total: usize = dims.iter().product();
        let mismatch = |detail: String| NetError::Shape { node: label.into(), detail };
        let mut out = Vec::with_capacity(shape.len());
        let mut infer = None;
        for (k, &s) in shape.iter().enumerate() {
            match s {
                -1 if infer.is_none() => {
                    infer = Some(k);
                    out.push(1);
                }
                0 if !allowzero => {
                    out.push(*dims.get(k).ok_or_else(|| mismatch(format!("shape entry {k} copies a missing dimension")))?)
                }
                s if s >= 0 && (s as u64) <= MAX_ELEMENTS as u64 => out.push(s as usize),
                s => return Err(mismatch(format!("invalid shape entry {s}"))),
            }
        }
        let known = checked_count(&out).ok_or_else(|| mismatch(format!("shape {shape:?} is too large")))?;
        if let Some(k) = infer {
            if known == 0 || total % known != 0 {
                return Err(mismatch(format!("cannot reshape {dims:?} ({total} elements) to {shape:?}")));
            }
            out[k] = total / known;
        } else if known != total {
            return Err(mismatch(format!("cannot reshape {dims:?} ({total} elements) to {shape:?}")));
        }
        Ok(with_dims(x, out))
    }

    fn add_sub(&mut self, node: &NodeProto, label: &str) -> Result<Value, NetError> {
        let a = self.required(node, label, 0)?.clone();
        let b = self.required(node, label, 1)?.clone();
        let sub = node.op_type == "Sub";
        let (x, c, x_first) = match (a, b) {
            (Value::Dyn(x), Value::Const(c)) => (x, c, true),
            (Value::Const(c), Value::Dyn(x)) => (x, c, false),
            (Value::Dyn(_), Value::Dyn(_)) => {
                return Err(NetError::Unsupported {
                    node: label.into(),
                    op: node.op_type.clone(),
                    detail: " of two computed values (only a constant may be added or subtracted)".into(),
                })
            }
            (Value::Const(_), Value::Const(_)) => {
                return Err(NetError::Invalid {
                    node: label.into(),
                    detail: "computes from constants only; constant folding is not supported".into(),
                })
            }
        };
        let cv = self.floats(&c, label)?.to_vec();
        let cb = broadcast_to(&cv, &c.dims, &x.dims).ok_or_else(|| NetError::Shape {
            node: label.into(),
            detail: format!("constant '{}' of shape {:?} does not broadcast to {:?}", c.name, c.dims, x.dims),
        })?;
        let n = x.len();
        let (d, b) = match (sub, x_first) {
            (false, _) => (Array1::ones(n), Array1::from(cb)),
            (true, true) => (Array1::ones(n), Array1::from(cb).mapv(|v| -v)),
            (true, false) => (-Array1::ones(n), Array1::from(cb)),
        };
        let dims = x.dims.clone();
        Ok(Value::Dyn(x.then(Step::Diag { d, b }, dims)))
    }

    fn matmul(&mut self, node: &NodeProto, label: &str) -> Result<Value, NetError> {
        let a = self.required(node, label, 0)?.clone();
        let b = self.required(node, label, 1)?.clone();
        let mismatch = |detail: String| NetError::Shape { node: label.into(), detail };
        match (a, b) {
            (Value::Dyn(x), Value::Const(c)) => {
                // x [..., K] · C [K, N] (or C [K]): the same map on every leading row.
                let cv = self.floats(&c, label)?;
                let (k, n, drop_n) = match c.dims.as_slice() {
                    [k] => (*k, 1, true),
                    [k, n] => (*k, *n, false),
                    _ => return Err(mismatch(format!("weights '{}' must have rank 1 or 2, not {:?}", c.name, c.dims))),
                };
                let Some((&xk, lead)) = x.dims.split_last() else {
                    return Err(mismatch("MatMul of a scalar".into()));
                };
                if xk != k {
                    return Err(mismatch(format!("input {:?} times weights '{}' {:?}", x.dims, c.name, c.dims)));
                }
                let rows: usize = lead.iter().product();
                let w = self.sized(rows * n, rows * k, label)?;
                let mut w = w;
                for r in 0..rows {
                    for kk in 0..k {
                        for nn in 0..n {
                            w[[r * n + nn, r * k + kk]] = cv[kk * n + nn];
                        }
                    }
                }
                let mut dims = lead.to_vec();
                if !drop_n {
                    dims.push(n);
                }
                let len = rows * n;
                Ok(Value::Dyn(x.then(Step::Linear { w, b: Array1::zeros(len) }, dims)))
            }
            (Value::Const(c), Value::Dyn(x)) => {
                // C [M, K] (or C [K]) · x [K, N] (or x [K]).
                let cv = self.floats(&c, label)?;
                let (m, k, drop_m) = match c.dims.as_slice() {
                    [k] => (1, *k, true),
                    [m, k] => (*m, *k, false),
                    _ => return Err(mismatch(format!("weights '{}' must have rank 1 or 2, not {:?}", c.name, c.dims))),
                };
                let (xk, n, drop_n) = match x.dims.as_slice() {
                    [k] => (*k, 1, true),
                    [k, n] => (*k, *n, false),
                    _ => return Err(mismatch(format!("computed operand must have rank 1 or 2, not {:?}", x.dims))),
                };
                if xk != k {
                    return Err(mismatch(format!("weights '{}' {:?} times input {:?}", c.name, c.dims, x.dims)));
                }
                let mut w = self.sized(m * n, k * n, label)?;
                for mm in 0..m {
                    for nn in 0..n {
                        for kk in 0..k {
                            w[[mm * n + nn, kk * n + nn]] = cv[mm * k + kk];
                        }
                    }
                }
                let mut dims = Vec::new();
                if !drop_m {
                    dims.push(m);
                }
                if !drop_n {
                    dims.push(n);
                }
                Ok(Value::Dyn(x.then(Step::Linear { w, b: Array1::zeros(m * n) }, dims)))
            }
            (Value::Dyn(_), Value::Dyn(_)) => Err(NetError::Unsupported {
                node: label.into(),
                op: "MatMul".into(),
                detail: " of two computed values (one operand must be a constant)".into(),
            }),
            (Value::Const(_), Value::Const(_)) => Err(NetError::Invalid {
                node: label.into(),
                detail: "computes from constants only; constant folding is not supported".into(),
            }),
        }
    }

    fn gemm(&mut self, node: &NodeProto, label: &str) -> Result<Value, NetError> {
        // Y = alpha · A' · B' + beta · C, with A' = Aᵀ if transA, B' = Bᵀ if transB.
        let alpha = attr_float(node, label, "alpha", 1.0)?;
        let beta = attr_float(node, label, "beta", 1.0)?;
        let trans_a = attr_int(node, label, "transA", 0)? != 0;
        let trans_b = attr_int(node, label, "transB", 0)? != 0;
        let a = self.required(node, label, 0)?.clone();
        let b = self.required(node, label, 1)?.clone();
        let c = self.input(node, label, 2)?.cloned();
        let mismatch = |detail: String| NetError::Shape { node: label.into(), detail };
        let matrix = |dims: &[usize], what: &str| -> Result<(usize, usize), NetError> {
            match dims {
                [r, c] => Ok((*r, *c)),
                _ => Err(NetError::Shape { node: label.into(), detail: format!("{what} must be a matrix, not {dims:?}") }),
            }
        };
        // (rows, cols) after transposition, and the flat index of element (i, j) of A'/B'.
        let oriented = |dims: (usize, usize), trans: bool| if trans { (dims.1, dims.0) } else { dims };
        let index = |dims: (usize, usize), trans: bool, i: usize, j: usize| {
            if trans {
                j * dims.1 + i
            } else {
                i * dims.1 + j
            }
        };
        let (x, w, m, n) = match (a, b) {
            (Value::Dyn(x), Value::Const(bt)) => {
                let bv = self.floats(&bt, label)?;
                let ad = matrix(&x.dims, "input A")?;
                let bd = matrix(&bt.dims, &format!("weights '{}'", bt.name))?;
                let (m, k) = oriented(ad, trans_a);
                let (k2, n) = oriented(bd, trans_b);
                if k != k2 {
                    return Err(mismatch(format!("A {:?} and B '{}' {:?} do not chain", x.dims, bt.name, bt.dims)));
                }
                let mut w = self.sized(m * n, m * k, label)?;
                for i in 0..m {
                    for j in 0..n {
                        for kk in 0..k {
                            w[[i * n + j, index(ad, trans_a, i, kk)]] = bv[index(bd, trans_b, kk, j)];
                        }
                    }
                }
                (x, w, m, n)
            }
            (Value::Const(at), Value::Dyn(x)) => {
                let av = self.floats(&at, label)?;
                let ad = matrix(&at.dims, &format!("weights '{}'", at.name))?;
                let bd = matrix(&x.dims, "input B")?;
                let (m, k) = oriented(ad, trans_a);
                let (k2, n) = oriented(bd, trans_b);
                if k != k2 {
                    return Err(mismatch(format!("A '{}' {:?} and B {:?} do not chain", at.name, at.dims, x.dims)));
                }
                let mut w = self.sized(m * n, k * n, label)?;
                for i in 0..m {
                    for j in 0..n {
                        for kk in 0..k {
                            w[[i * n + j, index(bd, trans_b, kk, j)]] = av[index(ad, trans_a, i, kk)];
                        }
                    }
                }
                (x, w, m, n)
            }
            (Value::Dyn(_), Value::Dyn(_)) => {
                return Err(NetError::Unsupported {
                    node: label.into(),
                    op: "Gemm".into(),
                    detail: " of two computed values (A or B must be a constant)".into(),
                })
            }
            (Value::Const(_), Value::Const(_)) => {
                return Err(NetError::Invalid {
                    node: label.into(),
                    detail: "computes from constants only; constant folding is not supported".into(),
                })
            }
        };
        let mut out = x.then(Step::Linear { w, b: Array1::zeros(m * n) }, vec![m, n]);
        // beta·C, split exactly as hi + lo so that no rounding enters the network.
        let (mut hi, mut lo) = (Array1::zeros(m * n), Array1::zeros(m * n));
        if let Some(cval) = c.filter(|_| beta != 0.0) {
            let Value::Const(ct) = cval else {
                return Err(NetError::Unsupported {
                    node: label.into(),
                    op: "Gemm".into(),
                    detail: " with a computed C (C must be a constant)".into(),
                });
            };
            let cv = self.floats(&ct, label)?.to_vec();
            let cb = broadcast_to(&cv, &ct.dims, &[m, n])
                .ok_or_else(|| mismatch(format!("C '{}' {:?} does not broadcast to [{m}, {n}]", ct.name, ct.dims)))?;
            for (i, v) in cb.iter().enumerate() {
                let (h, l) = split_mul(beta, *v).ok_or_else(|| NetError::Invalid {
                    node: label.into(),
                    detail: "beta·C cannot be represented exactly (underflow or overflow)".into(),
                })?;
                hi[i] = h;
                lo[i] = l;
            }
        }
        out = out.then(Step::Diag { d: Array1::from_elem(m * n, alpha), b: hi }, vec![m, n]);
        if lo.iter().any(|&v| v != 0.0) {
            out = out.then(Step::Diag { d: Array1::ones(m * n), b: lo }, vec![m, n]);
        }
        Ok(Value::Dyn(out))
    }
}

fn dims_of(v: &Value) -> Vec<usize> {
    match v {
        Value::Const(t) => t.dims.clone(),
        Value::Dyn(d) => d.dims.clone(),
    }
}

fn with_dims(v: Value, dims: Vec<usize>) -> Value {
    match v {
        Value::Const(t) => Value::Const(Rc::new(Tensor { name: t.name.clone(), dims, data: t.data.clone() })),
        Value::Dyn(d) => Value::Dyn(Dyn { dims, chain: d.chain }),
    }
}


/// `values` (shape `from`) broadcast to shape `to` by the standard's multidirectional
/// (numpy) rule, when the result has shape `to` exactly; `None` otherwise.
fn broadcast_to(values: &[f64], from: &[usize], to: &[usize]) -> Option<Vec<f64>> {
    // Leading dimensions of `from` beyond the rank of `to` must be 1.
    let extra = from.len().saturating_sub(to.len());
    if from[..extra].iter().any(|&d| d != 1) {
        return None;
    }
    let from = &from[extra..];
    let offset = to.len() - from.len();
    for (k, &d) in from.iter().enumerate() {
        if d != 1 && d != to[offset + k] {
            return None;
        }
    }
    let total: usize = to.iter().product();
    let mut out = Vec::with_capacity(total);
    let mut idx = vec![0usize; to.len()];
    for _ in 0..total {
        // Source index: row-major over `from`, with size-1 dimensions pinned to 0.
        let mut s = 0usize;
        for (k, &d) in from.iter().enumerate() {
            let i = if d == 1 { 0 } else { idx[offset + k] };
            s = s * d + i;
        }
        out.push(*values.get(s)?);
        for k in (0..to.len()).rev() {
            idx[k] += 1;
            if idx[k] < to[k] {
                break;
            }
            idx[k] = 0;
        }
    }
    Some(out)
}

fn find_attr<'a>(node: &'a NodeProto, name: &str) -> Option<&'a AttributeProto> {
    node.attribute.iter().find(|a| a.name == name)
}

fn attr_int(node: &NodeProto, label: &str, name: &str, default: i64) -> Result<i64, NetError> {
    match find_attr(node, name) {
        None => Ok(default),
        Some(a) if a.r#type == attribute_type::INT || a.r#type == 0 => Ok(a.i),
        Some(_) => Err(NetError::Invalid { node: label.into(), detail: format!("attribute '{name}' must be an integer") }),
    }
}

fn attr_float(node: &NodeProto, label: &str, name: &str, default: f64) -> Result<f64, NetError> {
    match find_attr(node, name) {
        None => Ok(default),
        Some(a) if (a.r#type == attribute_type::FLOAT || a.r#type == 0) && a.f.is_finite() => Ok(a.f as f64),
        Some(_) => Err(NetError::Invalid { node: label.into(), detail: format!("attribute '{name}' must be a finite float") }),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn exactness_checks() {
        assert_eq!(exact_mul(3.0, 0.5), Some(1.5));
        assert_eq!(exact_mul(0.1, 3.0), None); // 0.1·3 is not a double
        assert_eq!(exact_add(1.0, 2.0), Some(3.0));
        assert_eq!(exact_add(1.0, 1e-17), None);
        let (h, l) = split_mul(0.1, 3.0).unwrap();
        assert!(l != 0.0 && h == 0.1 * 3.0);
    }

    // Small models built directly from the schema types.
    fn vi(name: &str, dims: &[i64]) -> ValueInfoProto {
        ValueInfoProto {
            name: name.into(),
            r#type: Some(proto::TypeProto {
                tensor_type: Some(proto::TypeProtoTensor {
                    elem_type: data_type::DOUBLE,
                    shape: Some(proto::TensorShapeProto {
                        dim: dims
                            .iter()
                            .map(|&d| proto::Dimension { value: Some(proto::DimensionValue::DimValue(d)) })
                            .collect(),
                    }),
                }),
            }),
        }
    }

    fn node(op: &str, name: &str, inputs: &[&str], out: &str, attribute: Vec<AttributeProto>) -> NodeProto {
        NodeProto {
            input: inputs.iter().map(|s| s.to_string()).collect(),
            output: vec![out.into()],
            name: name.into(),
            op_type: op.into(),
            domain: String::new(),
            attribute,
        }
    }

    fn encode(nodes: Vec<NodeProto>, inits: Vec<TensorProto>, in_dims: &[i64]) -> Vec<u8> {
        let g = proto::GraphProto {
            node: nodes,
            name: "g".into(),
            initializer: inits,
            input: vec![vi("x", in_dims)],
            output: vec![vi("y", &[])],
        };
        ModelProto { ir_version: 8, opset_import: vec![], producer_name: String::new(), graph: Some(g) }.encode_to_vec()
    }

    fn doubles(name: &str, dims: &[i64], v: &[f64]) -> TensorProto {
        TensorProto {
            dims: dims.to_vec(),
            data_type: data_type::DOUBLE,
            name: name.into(),
            double_data: v.to_vec(),
            ..Default::default()
        }
    }

    #[test]
    fn constant_floats_and_inexact_beta_are_exact() {
        // y = x·W + beta·C with beta = float32(0.1) and C = 0.1 (a double): their product
        // needs more than 53 bits, so it is kept as hi + lo in two exact bias steps.
        let floats = AttributeProto { name: "value_floats".into(), r#type: attribute_type::FLOATS, floats: vec![2.0, -1.0], ..Default::default() };
        let beta = AttributeProto { name: "beta".into(), r#type: attribute_type::FLOAT, f: 0.1, ..Default::default() };
        let shape = AttributeProto { name: "value_ints".into(), r#type: attribute_type::INTS, ints: vec![2, 1], ..Default::default() };
        let bytes = encode(
            vec![
                node("Constant", "wflat", &[], "wf", vec![floats]),
                node("Constant", "wshape", &[], "ws", vec![shape]),
                node("Reshape", "wr", &["wf", "ws"], "w", vec![]),
                node("Gemm", "fc", &["x", "w", "c"], "y", vec![beta]),
            ],
            vec![doubles("c", &[1], &[0.1])],
            &[1, 2],
        );
        let net = load_onnx(&bytes).unwrap();
        assert!(net.is_float32(), "Constant value_floats are float32");
        let y = net.eval(&[1.0, 1.0]);
        let beta_c = (0.1f32 as f64) * 0.1; // the attribute is a float32
        assert!((y[0] - (1.0 + beta_c)).abs() < 1e-15, "{y:?}");
        assert_eq!(net.layers().len(), 2, "the bias is split in two exact steps: {:?}", net.layers());
        let (crate::net::Layer::Dense { b: hi, .. }, crate::net::Layer::Dense { b: lo, .. }) =
            (&net.layers()[0], &net.layers()[1])
        else {
            panic!("two dense layers expected");
        };
        // hi + lo is exactly beta·C: the FMA residual of the product (error-free transformation).
        assert_eq!(hi[0], (0.1f32 as f64) * 0.1);
        assert_eq!(lo[0], (0.1f32 as f64).mul_add(0.1, -hi[0]));
        assert!(lo[0] != 0.0);
    }

    #[test]
    fn computed_plus_computed_and_bad_shapes_are_rejected() {
        let bytes = encode(vec![node("Relu", "r", &["x"], "h", vec![]), node("Add", "res", &["x", "h"], "y", vec![])], vec![], &[1, 3]);
        let e = load_onnx(&bytes).unwrap_err().to_string();
        assert!(e.contains("'res' (Add)") && e.contains("two computed values"), "{e}");
        // A huge replicated Gemm (A of shape [8192, 1] with transA = 0) is refused, not allocated.
        let bytes = encode(vec![node("Gemm", "big", &["x", "w"], "y", vec![])], vec![doubles("w", &[1, 4096], &vec![1.0; 4096])], &[8192, 1]);
        let e = load_onnx(&bytes).unwrap_err().to_string();
        assert!(e.contains("'big' (Gemm)") && e.contains("too large"), "{e}");
        // Flatten with an axis beyond the rank.
        let axis = AttributeProto { name: "axis".into(), r#type: attribute_type::INT, i: 5, ..Default::default() };
        let bytes = encode(vec![node("Flatten", "fl", &["x"], "y", vec![axis])], vec![], &[1, 3]);
        assert!(load_onnx(&bytes).unwrap_err().to_string().contains("'fl' (Flatten)"));
        // Reshape to a size that does not match.
        let ints = TensorProto { dims: vec![1], data_type: data_type::INT64, name: "s".into(), int64_data: vec![4], ..Default::default() };
        let bytes = encode(vec![node("Reshape", "rs", &["x", "s"], "y", vec![])], vec![ints], &[1, 3]);
        let e = load_onnx(&bytes).unwrap_err().to_string();
        assert!(e.contains("'rs' (Reshape)") && e.contains("shape mismatch"), "{e}");
        // Raw data of the wrong length names the tensor.
        let t = TensorProto { dims: vec![3], data_type: data_type::DOUBLE, name: "short".into(), raw_data: vec![0; 16], ..Default::default() };
        let bytes = encode(vec![node("Add", "a", &["x", "short"], "y", vec![])], vec![t], &[1, 3]);
        assert!(load_onnx(&bytes).unwrap_err().to_string().contains("tensor 'short'"));
    }

    #[test]
    fn broadcast_rules() {
        // numpy: a [3] broadcasts to [2, 3] row-wise; [2, 1] column-wise.
        assert_eq!(broadcast_to(&[1.0, 2.0, 3.0], &[3], &[2, 3]).unwrap(), vec![1.0, 2.0, 3.0, 1.0, 2.0, 3.0]);
        assert_eq!(broadcast_to(&[1.0, 2.0], &[2, 1], &[2, 3]).unwrap(), vec![1.0, 1.0, 1.0, 2.0, 2.0, 2.0]);
        assert_eq!(broadcast_to(&[1.0], &[], &[2]).unwrap(), vec![1.0, 1.0]);
        assert!(broadcast_to(&[1.0, 2.0], &[2], &[3]).is_none());
        assert!(broadcast_to(&[1.0, 2.0], &[2, 1], &[1]).is_none());
    }
}
