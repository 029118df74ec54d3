//! Builds the ONNX graph of one model version from plain values (column
//! names, feature encoding, layer weights, target scale, category values).
//! Pure: no I/O, no tensors; the same inputs always give the same bytes, so
//! `verify` can rebuild an exported file and compare it byte for byte.
//!
//! The graph takes the raw input columns, one graph input per column named
//! after it, each of shape `[N, 1]`: number columns as float (NaN for a
//! missing value), category columns as strings (trimmed, as intake stores
//! them; an empty, unknown or missing value is "none of the known values").
//! Raw columns rather than the encoded vector so that a serving stack needs
//! nothing of tidegate's: the encoding travels inside the file and can
//! never drift from the model it belongs to.
//!
//! In order, it computes exactly what `tidegate predict` computes:
//! - number column: `(x − mean) / std` in f32 with the model's current
//!   scaling (a refreshed scaling is already in the spec and folded into the
//!   first layer), 0 where x is NaN;
//! - category column: the value's code (`ai.onnx.ml` CategoryMapper over the
//!   model's own vocabulary, −1 when unknown), compared with 0..width to give
//!   the one-hot block (all zeros for −1);
//! - the blocks concatenated in the model's input order, then the dense
//!   layers (Gemm with the stored `inputs × outputs` weights) with ReLU,
//!   Tanh or Sigmoid between them;
//! - regression: `mean + std · output` of the target's scale, in f64 as
//!   `predict` does, then f32: output `predicted_<target>` of shape `[N]`;
//! - classification: softmax over the logits in f64, `probabilities_<target>`
//!   `[N, K]` (f32), and the arg max (first on ties) mapped to the class
//!   label text, `predicted_<target>` `[N]` (string).
//!
//! Opset: `ai.onnx` 17 with IR version 8, and `ai.onnx.ml` 3 (the sets
//! released together in ONNX 1.12, 2022). Every operator used has had its
//! current meaning since opset 13 or earlier (Softmax over one axis since 13),
//! and 17 is read by ONNX Runtime from 1.12 on and by the other common
//! runtimes of the last years, so an older serving stack still loads the
//! file while nothing newer than what the graph needs is asked for.

use std::collections::BTreeMap;

use super::proto::{
    AttributeProto, Dimension, GraphProto, ModelProto, NodeProto, OperatorSetIdProto,
    StringStringEntryProto, TensorProto, TensorShapeProto, TensorTypeProto, TypeProto,
    ValueInfoProto, attribute_type, data_type, dimension, type_proto,
};
use crate::config::{Activation, Task};
use crate::model::{LayerWeights, TargetScale};
use crate::schema::{FeatureSpec, InputEncoding};

/// ONNX IR version of the file.
pub const IR_VERSION: i64 = 8;
/// Version of the default operator set (`ai.onnx`).
pub const OPSET: i64 = 17;
/// Version of the classical-ML operator set, for CategoryMapper.
pub const ML_OPSET: i64 = 3;
pub const ML_DOMAIN: &str = "ai.onnx.ml";
/// Prefix of every value name the graph makes up; no column may use it.
const INTERNAL: &str = "tidegate/";

/// Everything the graph is built from.
#[derive(Debug, Clone)]
pub struct GraphInput<'a> {
    /// Schema column names by column index.
    pub column_names: &'a [String],
    pub spec: &'a FeatureSpec,
    pub layers: &'a [LayerWeights],
    pub activation: Activation,
    pub target_scale: TargetScale,
    /// Category values per column index, in code order (the checkpoint's).
    pub vocabularies: &'a BTreeMap<usize, Vec<String>>,
    /// Written into the model's metadata, in this order.
    pub metadata: Vec<(String, String)>,
    pub producer_version: &'a str,
}

/// One graph input or output, as the export manifest describes it.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Port {
    pub name: String,
    /// "float" or "string".
    pub dtype: String,
    /// Dimensions; "N" is the number of rows.
    pub shape: Vec<String>,
}

/// The graph and its inputs and outputs.
#[derive(Debug, Clone)]
pub struct Built {
    pub model: ModelProto,
    pub inputs: Vec<Port>,
    pub outputs: Vec<Port>,
}

/// Why a model version cannot be written as a graph.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum GraphError {
    #[error("the model's encoding names column {0}, which the schema does not have")]
    UnknownColumn(usize),
    #[error(
        "the model's one-hot block of column {column} is {width} wide but its checkpoint lists {known} values"
    )]
    Vocabulary {
        column: String,
        width: usize,
        known: usize,
    },
    #[error("the model has {outputs} class outputs but its checkpoint lists {known} class labels")]
    Classes { outputs: usize, known: usize },
    #[error("layer {layer} is {inputs}×{outputs} with {values} weights and {biases} biases")]
    LayerShape {
        layer: usize,
        inputs: usize,
        outputs: usize,
        values: usize,
        biases: usize,
    },
    #[error("the layers do not chain: layer {layer} takes {got} inputs, {want} expected")]
    Chain {
        layer: usize,
        got: usize,
        want: usize,
    },
    #[error("the model has no layers")]
    NoLayers,
    #[error(
        "column name {0:?} clashes with a name the exported graph uses; rename the column or the target"
    )]
    NameClash(String),
}

/// Name of the graph output with the prediction (value or class label).
pub fn prediction_output(target: &str) -> String {
    format!("predicted_{target}")
}

/// Name of the graph output with the class probabilities.
pub fn probabilities_output(target: &str) -> String {
    format!("probabilities_{target}")
}

/// Builds the model.
pub fn build(g: &GraphInput<'_>) -> Result<Built, GraphError> {
    let spec = g.spec;
    let name_of = |c: usize| {
        g.column_names
            .get(c)
            .cloned()
            .ok_or(GraphError::UnknownColumn(c))
    };
    let target = name_of(spec.target)?;
    check_layers(g.layers, spec.width(), spec.outputs)?;

    let mut b = Builder::default();
    let mut inputs = Vec::new();
    let mut input_infos = Vec::new();
    let mut blocks = Vec::new();
    for enc in &spec.inputs {
        match *enc {
            InputEncoding::Number { column, mean, std } => {
                let col = name_of(column)?;
                input_infos.push(value_info(&col, data_type::FLOAT, &[None, Some(1)]));
                inputs.push(port(&col, "float", &["N", "1"]));
                let mean = b.tensor_f32("mean", &[1], &[mean]);
                let std = b.tensor_f32("std", &[1], &[std]);
                let zero = b.tensor_f32("zero", &[1], &[0.0]);
                let centred = b.op("Sub", &[&col, &mean], vec![]);
                let scaled = b.op("Div", &[&centred, &std], vec![]);
                let missing = b.op("IsNaN", &[&col], vec![]);
                blocks.push(b.op("Where", &[&missing, &zero, &scaled], vec![]));
            }
            InputEncoding::OneHot { column, width } => {
                let col = name_of(column)?;
                input_infos.push(value_info(&col, data_type::STRING, &[None, Some(1)]));
                inputs.push(port(&col, "string", &["N", "1"]));
                if width == 0 {
                    // No value known when the model was trained: no inputs.
                    continue;
                }
                let values = g.vocabularies.get(&column).map_or(&[][..], Vec::as_slice);
                if values.len() < width {
                    return Err(GraphError::Vocabulary {
                        column: col,
                        width,
                        known: values.len(),
                    });
                }
                let codes: Vec<i64> = (0..width as i64).collect();
                let code = b.op_in(
                    "CategoryMapper",
                    ML_DOMAIN,
                    &[&col],
                    vec![
                        attr_strings("cats_strings", &values[..width]),
                        attr_ints("cats_int64s", &codes),
                        attr_int("default_int64", -1),
                    ],
                );
                let range = b.tensor_i64("codes", &[width as i64], &codes);
                let hot = b.op("Equal", &[&code, &range], vec![]);
                blocks.push(b.op(
                    "Cast",
                    &[&hot],
                    vec![attr_int("to", data_type::FLOAT.into())],
                ));
            }
        }
    }
    let block_names: Vec<&str> = blocks.iter().map(String::as_str).collect();
    let mut h = b.op("Concat", &block_names, vec![attr_int("axis", 1)]);
    let last = g.layers.len() - 1;
    for (i, layer) in g.layers.iter().enumerate() {
        let w = b.tensor_f32(
            "weight",
            &[layer.inputs as i64, layer.outputs as i64],
            &layer.weight,
        );
        let bias = b.tensor_f32("bias", &[layer.outputs as i64], &layer.bias);
        h = b.op("Gemm", &[&h, &w, &bias], vec![]);
        if i < last {
            let op = match g.activation {
                Activation::Relu => "Relu",
                Activation::Tanh => "Tanh",
                Activation::Sigmoid => "Sigmoid",
            };
            h = b.op(op, &[&h], vec![]);
        }
    }

    let predicted = prediction_output(&target);
    let mut outputs = Vec::new();
    let mut output_infos = Vec::new();
    let wide = b.op(
        "Cast",
        &[&h],
        vec![attr_int("to", data_type::DOUBLE.into())],
    );
    match spec.task {
        Task::Regression => {
            let std = b.tensor_f64("target_std", &[1], &[g.target_scale.std]);
            let mean = b.tensor_f64("target_mean", &[1], &[g.target_scale.mean]);
            let scaled = b.op("Mul", &[&wide, &std], vec![]);
            let value = b.op("Add", &[&scaled, &mean], vec![]);
            let narrow = b.op(
                "Cast",
                &[&value],
                vec![attr_int("to", data_type::FLOAT.into())],
            );
            let flat = b.tensor_i64("flat", &[1], &[-1]);
            b.op_to("Reshape", "", &[&narrow, &flat], &predicted, vec![]);
            output_infos.push(value_info(&predicted, data_type::FLOAT, &[None]));
            outputs.push(port(&predicted, "float", &["N"]));
        }
        Task::Classification => {
            let labels = g
                .vocabularies
                .get(&spec.target)
                .map_or(&[][..], Vec::as_slice);
            if labels.len() < spec.outputs {
                return Err(GraphError::Classes {
                    outputs: spec.outputs,
                    known: labels.len(),
                });
            }
            let k = spec.outputs;
            let probs_name = probabilities_output(&target);
            let p = b.op("Softmax", &[&wide], vec![attr_int("axis", 1)]);
            b.op_to(
                "Cast",
                "",
                &[&p],
                &probs_name,
                vec![attr_int("to", data_type::FLOAT.into())],
            );
            let best = b.op(
                "ArgMax",
                &[&p],
                vec![
                    attr_int("axis", 1),
                    attr_int("keepdims", 0),
                    attr_int("select_last_index", 0),
                ],
            );
            let table = b.tensor_str("labels", &labels[..k]);
            b.op_to(
                "Gather",
                "",
                &[&table, &best],
                &predicted,
                vec![attr_int("axis", 0)],
            );
            output_infos.push(value_info(&predicted, data_type::STRING, &[None]));
            output_infos.push(value_info(
                &probs_name,
                data_type::FLOAT,
                &[None, Some(k as i64)],
            ));
            outputs.push(port(&predicted, "string", &["N"]));
            outputs.push(port(&probs_name, "float", &["N", &k.to_string()]));
        }
    }

    // Graph inputs and outputs share one namespace with the values inside.
    let mut seen = std::collections::HashSet::new();
    for name in inputs.iter().chain(&outputs).map(|p| &p.name) {
        if name.starts_with(INTERNAL) || !seen.insert(name.clone()) {
            return Err(GraphError::NameClash(name.clone()));
        }
    }

    let doc = format!(
        "tidegate model of {target} ({task}). Inputs: one [N, 1] tensor per column, numbers as float \
         (NaN = missing), categories as trimmed strings (unknown or empty = none of the known values). \
         Outputs: {}.",
        outputs
            .iter()
            .map(|p| format!("{} [{}] {}", p.name, p.shape.join(", "), p.dtype))
            .collect::<Vec<_>>()
            .join("; "),
        task = spec.task
    );
    let graph = GraphProto {
        node: b.nodes,
        name: Some("tidegate".into()),
        initializer: b.initializers,
        doc_string: Some(doc.clone()),
        input: input_infos,
        output: output_infos,
    };
    let model = ModelProto {
        ir_version: Some(IR_VERSION),
        producer_name: Some("tidegate".into()),
        producer_version: Some(g.producer_version.to_string()),
        domain: None,
        model_version: None,
        doc_string: Some(doc),
        graph: Some(graph),
        opset_import: vec![
            OperatorSetIdProto {
                domain: Some(String::new()),
                version: Some(OPSET),
            },
            OperatorSetIdProto {
                domain: Some(ML_DOMAIN.into()),
                version: Some(ML_OPSET),
            },
        ],
        metadata_props: g
            .metadata
            .iter()
            .map(|(k, v)| StringStringEntryProto {
                key: Some(k.clone()),
                value: Some(v.clone()),
            })
            .collect(),
    };
    Ok(Built {
        model,
        inputs,
        outputs,
    })
}

fn check_layers(layers: &[LayerWeights], width: usize, outputs: usize) -> Result<(), GraphError> {
    if layers.is_empty() {
        return Err(GraphError::NoLayers);
    }
    let mut want = width;
    for (i, l) in layers.iter().enumerate() {
        if l.weight.len() != l.inputs * l.outputs || l.bias.len() != l.outputs {
            return Err(GraphError::LayerShape {
                layer: i,
                inputs: l.inputs,
                outputs: l.outputs,
                values: l.weight.len(),
                biases: l.bias.len(),
            });
        }
        if l.inputs != want {
            return Err(GraphError::Chain {
                layer: i,
                got: l.inputs,
                want,
            });
        }
        want = l.outputs;
    }
    if want != outputs {
        return Err(GraphError::Chain {
            layer: layers.len(),
            got: want,
            want: outputs,
        });
    }
    Ok(())
}

/// Nodes and constants in the order they are made (which is topological,
/// since every node only reads values made before it).
#[derive(Default)]
struct Builder {
    nodes: Vec<NodeProto>,
    initializers: Vec<TensorProto>,
    made: usize,
}

impl Builder {
    fn fresh(&mut self, what: &str) -> String {
        self.made += 1;
        format!("{INTERNAL}{}/{what}", self.made)
    }

    fn op(&mut self, op: &str, inputs: &[&str], attrs: Vec<AttributeProto>) -> String {
        let out = self.fresh(&op.to_ascii_lowercase());
        self.op_to(op, "", inputs, &out, attrs);
        out
    }

    fn op_in(
        &mut self,
        op: &str,
        domain: &str,
        inputs: &[&str],
        attrs: Vec<AttributeProto>,
    ) -> String {
        let out = self.fresh(&op.to_ascii_lowercase());
        self.op_to(op, domain, inputs, &out, attrs);
        out
    }

    fn op_to(
        &mut self,
        op: &str,
        domain: &str,
        inputs: &[&str],
        output: &str,
        attrs: Vec<AttributeProto>,
    ) {
        let name = format!("{INTERNAL}node/{}", self.nodes.len());
        self.nodes.push(NodeProto {
            input: inputs.iter().map(|s| s.to_string()).collect(),
            output: vec![output.to_string()],
            name: Some(name),
            op_type: Some(op.into()),
            attribute: attrs,
            doc_string: None,
            domain: (!domain.is_empty()).then(|| domain.to_string()),
        });
    }

    fn tensor(&mut self, what: &str, dims: &[i64], dtype: i32, raw: Vec<u8>) -> String {
        let name = self.fresh(what);
        self.initializers.push(TensorProto {
            dims: dims.to_vec(),
            data_type: Some(dtype),
            string_data: Vec::new(),
            name: Some(name.clone()),
            raw_data: Some(raw),
        });
        name
    }

    fn tensor_f32(&mut self, what: &str, dims: &[i64], values: &[f32]) -> String {
        let raw = values.iter().flat_map(|v| v.to_le_bytes()).collect();
        self.tensor(what, dims, data_type::FLOAT, raw)
    }

    fn tensor_f64(&mut self, what: &str, dims: &[i64], values: &[f64]) -> String {
        let raw = values.iter().flat_map(|v| v.to_le_bytes()).collect();
        self.tensor(what, dims, data_type::DOUBLE, raw)
    }

    fn tensor_i64(&mut self, what: &str, dims: &[i64], values: &[i64]) -> String {
        let raw = values.iter().flat_map(|v| v.to_le_bytes()).collect();
        self.tensor(what, dims, data_type::INT64, raw)
    }

    fn tensor_str(&mut self, what: &str, values: &[String]) -> String {
        let name = self.fresh(what);
        self.initializers.push(TensorProto {
            dims: vec![values.len() as i64],
            data_type: Some(data_type::STRING),
            string_data: values.iter().map(|v| v.as_bytes().to_vec()).collect(),
            name: Some(name.clone()),
            raw_data: None,
        });
        name
    }
}

fn attr(name: &str, kind: i32) -> AttributeProto {
    AttributeProto {
        name: Some(name.into()),
        r#type: Some(kind),
        ..AttributeProto::default()
    }
}

fn attr_int(name: &str, v: i64) -> AttributeProto {
    AttributeProto {
        i: Some(v),
        ..attr(name, attribute_type::INT)
    }
}

fn attr_ints(name: &str, v: &[i64]) -> AttributeProto {
    AttributeProto {
        ints: v.to_vec(),
        ..attr(name, attribute_type::INTS)
    }
}

fn attr_strings(name: &str, v: &[String]) -> AttributeProto {
    AttributeProto {
        strings: v.iter().map(|s| s.as_bytes().to_vec()).collect(),
        ..attr(name, attribute_type::STRINGS)
    }
}

/// A tensor value's type; `None` dimensions are the row count "N".
fn value_info(name: &str, elem: i32, dims: &[Option<i64>]) -> ValueInfoProto {
    let dim = dims
        .iter()
        .map(|d| Dimension {
            value: Some(match d {
                Some(v) => dimension::Value::DimValue(*v),
                None => dimension::Value::DimParam("N".into()),
            }),
        })
        .collect();
    ValueInfoProto {
        name: Some(name.into()),
        r#type: Some(TypeProto {
            value: Some(type_proto::Value::TensorType(TensorTypeProto {
                elem_type: Some(elem),
                shape: Some(TensorShapeProto { dim }),
            })),
        }),
        doc_string: None,
    }
}

fn port(name: &str, dtype: &str, shape: &[&str]) -> Port {
    Port {
        name: name.into(),
        dtype: dtype.into(),
        shape: shape.iter().map(|s| s.to_string()).collect(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use prost::Message;

    fn names(n: &[&str]) -> Vec<String> {
        n.iter().map(|s| s.to_string()).collect()
    }

    fn layer(inputs: usize, outputs: usize) -> LayerWeights {
        LayerWeights {
            inputs,
            outputs,
            weight: (0..inputs * outputs).map(|i| i as f32 * 0.5).collect(),
            bias: vec![0.25; outputs],
        }
    }

    fn regression_spec() -> FeatureSpec {
        FeatureSpec {
            inputs: vec![
                InputEncoding::Number {
                    column: 0,
                    mean: 2.0,
                    std: 4.0,
                },
                InputEncoding::OneHot {
                    column: 1,
                    width: 2,
                },
            ],
            target: 2,
            task: Task::Regression,
            outputs: 1,
        }
    }

    fn input<'a>(
        cols: &'a [String],
        spec: &'a FeatureSpec,
        layers: &'a [LayerWeights],
        vocabs: &'a BTreeMap<usize, Vec<String>>,
    ) -> GraphInput<'a> {
        GraphInput {
            column_names: cols,
            spec,
            layers,
            activation: Activation::Tanh,
            target_scale: TargetScale {
                mean: 10.0,
                std: 3.0,
            },
            vocabularies: vocabs,
            metadata: vec![("tidegate.model".into(), "m000001".into())],
            producer_version: "test",
        }
    }

    #[test]
    fn regression_graph_takes_raw_columns_and_carries_the_weights() {
        let cols = names(&["flour_kg", "weekday", "loaves"]);
        let spec = regression_spec();
        let layers = vec![layer(3, 4), layer(4, 1)];
        // The vocabulary grew past the model's width: the extra value is
        // left out, so it scores as unknown, as in `predict`.
        let vocabs = BTreeMap::from([(1, names(&["mon", "tue", "wed"]))]);
        let built = build(&input(&cols, &spec, &layers, &vocabs)).unwrap();
        let graph = built.model.graph.as_ref().unwrap();
        let inputs: Vec<_> = graph
            .input
            .iter()
            .map(|v| v.name.clone().unwrap())
            .collect();
        assert_eq!(inputs, names(&["flour_kg", "weekday"]));
        assert_eq!(graph.output[0].name.as_deref(), Some("predicted_loaves"));
        let ops: Vec<_> = graph
            .node
            .iter()
            .map(|n| n.op_type.clone().unwrap())
            .collect();
        assert_eq!(
            ops,
            names(&[
                "Sub",
                "Div",
                "IsNaN",
                "Where",
                "CategoryMapper",
                "Equal",
                "Cast",
                "Concat",
                "Gemm",
                "Tanh",
                "Gemm",
                "Cast",
                "Mul",
                "Add",
                "Cast",
                "Reshape"
            ])
        );
        let mapper = &graph.node[4];
        assert_eq!(mapper.domain.as_deref(), Some(ML_DOMAIN));
        let cats = mapper
            .attribute
            .iter()
            .find(|a| a.name.as_deref() == Some("cats_strings"))
            .unwrap();
        assert_eq!(cats.strings, vec![b"mon".to_vec(), b"tue".to_vec()]);
        let w0 = graph
            .initializer
            .iter()
            .find(|t| t.dims == vec![3, 4])
            .unwrap();
        let back: Vec<f32> = w0
            .raw_data
            .as_ref()
            .unwrap()
            .chunks_exact(4)
            .map(|c| f32::from_le_bytes(c.try_into().unwrap()))
            .collect();
        assert_eq!(back, layers[0].weight);
    }

    #[test]
    fn bytes_are_deterministic_and_decode_back() {
        let cols = names(&["flour_kg", "weekday", "loaves"]);
        let spec = regression_spec();
        let layers = vec![layer(3, 1)];
        let vocabs = BTreeMap::from([(1, names(&["mon", "tue"]))]);
        let a = build(&input(&cols, &spec, &layers, &vocabs))
            .unwrap()
            .model
            .encode_to_vec();
        let b = build(&input(&cols, &spec, &layers, &vocabs))
            .unwrap()
            .model
            .encode_to_vec();
        assert_eq!(a, b);
        let back = ModelProto::decode(a.as_slice()).unwrap();
        assert_eq!(back.ir_version, Some(IR_VERSION));
        assert_eq!(back.opset_import[0].version, Some(OPSET));
        assert_eq!(back.opset_import[1].domain.as_deref(), Some(ML_DOMAIN));
    }

    #[test]
    fn classification_graph_labels_its_classes() {
        let cols = names(&["temp", "grade"]);
        let spec = FeatureSpec {
            inputs: vec![InputEncoding::Number {
                column: 0,
                mean: 0.0,
                std: 1.0,
            }],
            target: 1,
            task: Task::Classification,
            outputs: 3,
        };
        let layers = vec![layer(1, 5), layer(5, 3)];
        let vocabs = BTreeMap::from([(1, names(&["low", "mid", "high"]))]);
        let built = build(&input(&cols, &spec, &layers, &vocabs)).unwrap();
        let out: Vec<_> = built.outputs.iter().map(|p| p.name.clone()).collect();
        assert_eq!(out, names(&["predicted_grade", "probabilities_grade"]));
        assert_eq!(built.outputs[1].shape, names(&["N", "3"]));
        let graph = built.model.graph.unwrap();
        let labels = graph
            .initializer
            .iter()
            .find(|t| t.data_type == Some(data_type::STRING))
            .unwrap();
        assert_eq!(labels.string_data.len(), 3);
    }

    #[test]
    fn refuses_what_it_cannot_write() {
        let cols = names(&["flour_kg", "weekday", "loaves"]);
        let spec = regression_spec();
        let vocabs = BTreeMap::from([(1, names(&["mon"]))]);
        let layers = vec![layer(3, 1)];
        assert!(matches!(
            build(&input(&cols, &spec, &layers, &vocabs)),
            Err(GraphError::Vocabulary {
                width: 2,
                known: 1,
                ..
            })
        ));
        let vocabs = BTreeMap::from([(1, names(&["mon", "tue"]))]);
        let wrong = vec![layer(4, 1)];
        assert!(matches!(
            build(&input(&cols, &spec, &wrong, &vocabs)),
            Err(GraphError::Chain { .. })
        ));
        let clash = names(&["predicted_loaves", "weekday", "loaves"]);
        assert!(matches!(
            build(&input(&clash, &spec, &layers, &vocabs)),
            Err(GraphError::NameClash(_))
        ));
    }
}
