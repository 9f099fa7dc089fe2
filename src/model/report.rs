//! The layer report: for every layer that changes the tensor, its output shape, parameters,
//! multiply-accumulates, receptive field and cumulative stride; then the totals.
//!
//! Operators and their attributes come from the ONNX graph itself (one row per ONNX node, with
//! the node's own name, which is what the engineer sees in their exporter), and output shapes
//! from tract's typing of that graph at batch 1. MACs count multiply-accumulates per image:
//! a convolution costs `output elements x (C_in / groups) x kh x kw`, a fully connected layer
//! `M x N x K`. Pooling, additions and reshapes cost none (they do no multiplications).
//!
//! Receptive field and stride follow the usual recurrence over the graph (common practice):
//! `rf_out = rf_in + (k - 1) * d * jump_in`, `jump_out = jump_in * s`, starting from 1 and 1 at
//! the image input; where branches meet (Add, Concat) the larger field is kept.

use std::collections::HashMap;

use serde::Serialize;
use tract_onnx::pb;
use tract_onnx::prelude::*;

/// One row of the report.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Layer {
    /// Position among the reported layers, from 0.
    pub index: usize,
    /// The ONNX node's name (or its first output's name when the node has none).
    pub name: String,
    /// The ONNX operator.
    pub op: String,
    /// Output shape at batch 1.
    pub output_shape: Vec<usize>,
    /// Learned parameters held by this layer (weights and biases).
    pub params: u64,
    /// Multiply-accumulates per image.
    pub macs: u64,
    /// Receptive field in input pixels (spatial layers only).
    pub receptive_field: Option<u64>,
    /// Cumulative stride in input pixels (spatial layers only).
    pub stride: Option<u64>,
}

/// The whole report.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Report {
    /// The reported layers, in graph order.
    pub layers: Vec<Layer>,
    /// All learned parameters (including those of layers not listed, e.g. batch norm scale and shift).
    pub params: u64,
    /// Multiply-accumulates per image.
    pub macs_per_image: u64,
    /// Parameters in fully connected layers (Gemm, MatMul with a constant operand).
    pub fc_params: u64,
    /// Size of the ONNX file in bytes.
    pub model_bytes: u64,
}

impl Report {
    /// Share of the parameters in fully connected layers, 0..=1.
    pub fn fc_share(&self) -> f64 {
        if self.params == 0 { 0.0 } else { self.fc_params as f64 / self.params as f64 }
    }
}

/// Operators that get a row: those that change the tensor's shape or mix its values.
const REPORTED: &[&str] = &[
    "Conv",
    "ConvTranspose",
    "MaxPool",
    "AveragePool",
    "LpPool",
    "GlobalAveragePool",
    "GlobalMaxPool",
    "Gemm",
    "MatMul",
    "Add",
    "Sum",
    "Concat",
    "Reshape",
    "Flatten",
];

fn attr<'a>(node: &'a pb::NodeProto, name: &str) -> Option<&'a pb::AttributeProto> {
    node.attribute.iter().find(|a| a.name == name)
}

fn ints(node: &pb::NodeProto, name: &str) -> Option<Vec<u64>> {
    attr(node, name).map(|a| a.ints.iter().map(|&v| v.max(0) as u64).collect())
}

fn int(node: &pb::NodeProto, name: &str, default: i64) -> i64 {
    attr(node, name).map_or(default, |a| a.i)
}

/// Spatial state of a tensor: receptive field and cumulative stride.
#[derive(Debug, Clone, Copy)]
struct Field {
    rf: u64,
    jump: u64,
}

/// Build the report of an ONNX graph, with shapes from `typed` (typed at batch 1).
pub fn build(proto: &pb::ModelProto, typed: &TypedModel, model_bytes: u64) -> Report {
    let empty = pb::GraphProto::default();
    let graph = proto.graph.as_ref().unwrap_or(&empty);
    let consts = constants(graph);
    let shape = |name: &str| -> Vec<usize> {
        typed
            .find_outlet_label(name)
            .and_then(|o| typed.outlet_fact(o).ok())
            .map(|f| f.shape.iter().map(|d| d.to_i64().map_or(0, |v| v.max(0) as usize)).collect())
            .unwrap_or_default()
    };

    let mut fields: HashMap<&str, Field> = HashMap::new();
    for input in graph.input.iter().filter(|i| !consts.contains_key(i.name.as_str())) {
        fields.insert(input.name.as_str(), Field { rf: 1, jump: 1 });
    }

    let mut layers = Vec::new();
    let (mut params, mut fc_params, mut macs_total) = (0u64, 0u64, 0u64);
    for node in &graph.node {
        let Some(out_name) = node.output.first() else { continue };
        let out_shape = shape(out_name);
        let in_shape = shape(node.input.first().map(String::as_str).unwrap_or(""));
        let incoming =
            node.input.iter().filter_map(|i| fields.get(i.as_str()).copied()).fold(None, |acc: Option<Field>, f| {
                Some(match acc {
                    None => f,
                    Some(a) => Field { rf: a.rf.max(f.rf), jump: a.jump.max(f.jump) },
                })
            });
        let c = cost(node, &consts, &out_shape, &in_shape, incoming);
        // A tensor that is no longer an image (flattened, fully connected) has no field.
        let field = c.field.filter(|_| out_shape.len() == 4);
        if let Some(f) = field {
            for o in &node.output {
                fields.insert(o.as_str(), f);
            }
        }
        params += c.params;
        macs_total += c.macs;
        if c.fc {
            fc_params += c.params;
        }
        if REPORTED.contains(&node.op_type.as_str()) {
            layers.push(Layer {
                index: layers.len(),
                name: if node.name.is_empty() { out_name.clone() } else { node.name.clone() },
                op: node.op_type.clone(),
                output_shape: out_shape,
                params: c.params,
                macs: c.macs,
                receptive_field: field.map(|f| f.rf),
                stride: field.map(|f| f.jump),
            });
        }
    }
    Report { layers, params, macs_per_image: macs_total, fc_params, model_bytes }
}

/// The dimensions of the graph's constant tensors: initializers and Constant nodes.
fn constants(graph: &pb::GraphProto) -> HashMap<&str, Vec<u64>> {
    let mut consts: HashMap<&str, Vec<u64>> = graph
        .initializer
        .iter()
        .map(|t| (t.name.as_str(), t.dims.iter().map(|&d| d.max(0) as u64).collect()))
        .collect();
    for n in graph.node.iter().filter(|n| n.op_type == "Constant") {
        if let (Some(out), Some(t)) = (n.output.first(), attr(n, "value").and_then(|a| a.t.as_ref())) {
            consts.insert(out.as_str(), t.dims.iter().map(|&d| d.max(0) as u64).collect());
        }
    }
    consts
}

/// What one node costs and how it changes the receptive field.
struct Cost {
    params: u64,
    macs: u64,
    /// A fully connected layer (Gemm, MatMul by a constant).
    fc: bool,
    field: Option<Field>,
}

/// A node's learned parameters, its MACs per image and its field, from its weights' shapes
/// (`consts`) and its input and output shapes.
fn cost(
    node: &pb::NodeProto,
    consts: &HashMap<&str, Vec<u64>>,
    out_shape: &[usize],
    in_shape: &[usize],
    incoming: Option<Field>,
) -> Cost {
    let numel = |name: &str| consts.get(name).map(|d| d.iter().product::<u64>());
    let weights = || node.input.get(1).and_then(|n| consts.get(n.as_str())).cloned().unwrap_or_default();
    let out_elems = |skip: usize| out_shape.iter().skip(skip).map(|&d| d as u64).product::<u64>();
    let mut c = Cost { params: 0, macs: 0, fc: false, field: incoming };
    match node.op_type.as_str() {
        "Conv" | "ConvTranspose" => {
            let w = weights();
            c.params = w.iter().product::<u64>() + node.input.get(2).and_then(|b| numel(b)).unwrap_or(0);
            let per_output: u64 = w.iter().skip(1).product();
            c.macs = if node.op_type == "Conv" { out_elems(1) * per_output } else { 0 };
            let kernel = ints(node, "kernel_shape").unwrap_or_else(|| w.iter().skip(2).copied().collect());
            c.field = incoming.map(|f| spatial(f, &kernel, ints(node, "strides"), ints(node, "dilations")));
        }
        "MaxPool" | "AveragePool" | "LpPool" => {
            let kernel = ints(node, "kernel_shape").unwrap_or_default();
            c.field = incoming.map(|f| spatial(f, &kernel, ints(node, "strides"), ints(node, "dilations")));
        }
        "GlobalAveragePool" | "GlobalMaxPool" => {
            // The kernel is the whole input plane.
            let kernel: Vec<u64> = in_shape.iter().skip(2).map(|&d| d as u64).collect();
            c.field = incoming.map(|f| spatial(f, &kernel, Some(kernel.clone()), None));
        }
        "Gemm" => {
            let b = weights();
            c.params = b.iter().product::<u64>() + node.input.get(2).and_then(|x| numel(x)).unwrap_or(0);
            let k = if int(node, "transB", 0) != 0 { b.get(1) } else { b.first() }.copied().unwrap_or(0);
            (c.macs, c.fc) = (out_elems(0) * k, true);
        }
        "MatMul" => {
            if let Some(b) = node.input.get(1).and_then(|n| consts.get(n.as_str())) {
                c.params = b.iter().product();
                let k = b.len().checked_sub(2).and_then(|i| b.get(i)).copied().unwrap_or(0);
                (c.macs, c.fc) = (out_elems(0) * k, true);
            }
        }
        "BatchNormalization" => {
            // Learned: scale and shift; the running mean and variance are statistics.
            c.params = [1, 2].iter().filter_map(|&i| node.input.get(i)).filter_map(|n| numel(n)).sum();
        }
        "PRelu" => c.params = node.input.get(1).and_then(|n| numel(n)).unwrap_or(0),
        _ => {}
    }
    c
}

/// One spatial stage: kernel `k` (per axis), strides, dilations. The report keeps the
/// largest axis (square kernels in practice).
fn spatial(f: Field, kernel: &[u64], strides: Option<Vec<u64>>, dilations: Option<Vec<u64>>) -> Field {
    let k = kernel.iter().copied().max().unwrap_or(1).max(1);
    let s = strides.and_then(|s| s.into_iter().max()).unwrap_or(1).max(1);
    let d = dilations.and_then(|d| d.into_iter().max()).unwrap_or(1).max(1);
    Field { rf: f.rf + (k - 1) * d * f.jump, jump: f.jump * s }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn receptive_field_recurrence_matches_textbook_values() {
        // Common practice (standard CNN shape rules): three stacked 3x3 stride-1 convolutions
        // see 7x7; a 2x2 stride-2 pool then doubles the step between outputs.
        let mut f = Field { rf: 1, jump: 1 };
        for _ in 0..3 {
            f = spatial(f, &[3, 3], None, None);
        }
        assert_eq!((f.rf, f.jump), (7, 1));
        f = spatial(f, &[2, 2], Some(vec![2, 2]), None);
        assert_eq!((f.rf, f.jump), (8, 2));
        // a 3x3 conv after the pool grows the field by (3 - 1) * 2
        f = spatial(f, &[3, 3], None, None);
        assert_eq!((f.rf, f.jump), (12, 2));
        // dilation 2 makes a 3x3 kernel span 5
        let d = spatial(Field { rf: 1, jump: 1 }, &[3, 3], None, Some(vec![2, 2]));
        assert_eq!(d.rf, 5);
    }
}
