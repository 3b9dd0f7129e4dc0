//! ONNX graphs whose work is one ai.onnx.ml tree or linear operator
//! (`TreeEnsembleRegressor`, `TreeEnsembleClassifier`, `LinearRegressor`,
//! `LinearClassifier`, as the ONNX operator specification "ai.onnx.ml"
//! defines them), read into the native tree and linear models so that the
//! exact algorithms apply. The per-feature steps exporters put in front
//! (`Cast`, `Identity`, `Scaler`, `Imputer`) are folded in: into each split,
//! found on the double lattice so that the native `x < threshold` decides as
//! the graph does for every double input, or into the linear weights. What
//! follows the operator's score output (`ZipMap`, `Normalizer`, `Cast`) and
//! its label output are not read: the margin before the operator's
//! `post_transform` is what is explained. Any other graph is left to the
//! graph runtime, with its score output chosen by type, never a label.

use std::collections::HashMap;

use prost::Message;

use super::onnx_schema::{
    AttributeProto, DOUBLE, FLOAT, GraphProto, INT64, ModelProto, NodeProto, STRING, ValueInfoProto,
};
use super::{ImportedTrees, SourceNode, Split, build_tree, choose_class, negate};
use crate::engine::error::{EngineError, Result};
use crate::model::{Link, TreeBody};

const FIELD: &str = "onnx";
const ML: &str = "ai.onnx.ml";

fn refuse(message: impl Into<String>) -> EngineError {
    EngineError::new(FIELD, message)
}

/// What the caller chose: the output to read (empty: the score output),
/// the column of a `[batch, k]` output, and the class.
#[derive(Debug, Clone, Copy)]
pub struct OnnxChoice<'a> {
    pub output: &'a str,
    pub column: u32,
    pub class_index: Option<u32>,
    /// Features registered with the graph (0: take `x0…` names from the
    /// graph's declared input width).
    pub features: usize,
}

/// A linear model read from a graph: output = weights · x + intercept is the
/// operator's margin for `class_index`.
#[derive(Debug, Clone, PartialEq)]
pub struct ImportedLinear {
    pub weights: Vec<f64>,
    pub intercept: f64,
    pub link: Link,
    pub feature_names: Vec<String>,
    pub objective: String,
    pub class_index: u32,
}

/// How a graph is served.
#[derive(Debug, Clone, PartialEq)]
pub enum OnnxImport {
    /// As native trees; `output` is the score output explained.
    Trees {
        trees: ImportedTrees,
        output: String,
    },
    /// As a native linear model.
    Linear {
        linear: ImportedLinear,
        output: String,
    },
    /// In the graph runtime, reading `output` (chosen by type when the
    /// caller named none). `probability` says the output is already a
    /// probability, so a logistic link on it would be applied twice.
    /// `feature_names` is set when the caller gave no features.
    Graph {
        output: String,
        probability: bool,
        feature_names: Vec<String>,
        why: String,
    },
}

/// Reads an ONNX `ModelProto` and decides how it is served.
pub fn onnx_graph(bytes: &[u8], choice: OnnxChoice<'_>) -> Result<OnnxImport> {
    let model =
        ModelProto::decode(bytes).map_err(|e| refuse(format!("is not an ONNX ModelProto: {e}")))?;
    let graph = model
        .graph
        .as_ref()
        .ok_or_else(|| refuse("is an ONNX model without a graph"))?;
    let view = GraphView::new(graph);
    let input = view.single_input()?;
    let width = declared_width(input);
    let inputs = match (choice.features, width) {
        (0, Some(width)) => width,
        (0, None) => {
            return Err(EngineError::new(
                "features",
                "is empty and the graph's input has no fixed width; give one feature per input",
            ));
        }
        (given, Some(width)) if given != width => {
            return Err(EngineError::new(
                "features",
                format!(
                    "has {given} entries, but the graph's input `{}` is declared [batch, {width}]; give one per input",
                    input.name
                ),
            ));
        }
        (given, _) => given,
    };
    let feature_names = if choice.features == 0 {
        (0..inputs).map(|j| format!("x{j}")).collect()
    } else {
        Vec::new()
    };
    match view.mapped(input, inputs, choice)? {
        Mapped::Trees(mut trees, output) => {
            trees.feature_names = feature_names;
            Ok(OnnxImport::Trees { trees, output })
        }
        Mapped::Linear(mut linear, output) => {
            linear.feature_names = feature_names;
            Ok(OnnxImport::Linear { linear, output })
        }
        Mapped::Not(why) => {
            let (output, probability) = view.graph_output(choice.output)?;
            Ok(OnnxImport::Graph {
                output,
                probability,
                feature_names,
                why,
            })
        }
    }
}

enum Mapped {
    Trees(ImportedTrees, String),
    Linear(ImportedLinear, String),
    /// Not one operator behind foldable steps: why, for the log.
    Not(String),
}

/// The graph with its tensors' producers and consumers.
struct GraphView<'g> {
    graph: &'g GraphProto,
    producer: HashMap<&'g str, &'g NodeProto>,
    consumers: HashMap<&'g str, Vec<&'g NodeProto>>,
}

/// Element type of a tensor value, or None for sequences and maps.
fn elem_type(value: &ValueInfoProto) -> Option<i32> {
    value
        .r#type
        .as_ref()
        .and_then(|t| t.tensor_type.as_ref())
        .map(|t| t.elem_type)
}

fn declared_width(input: &ValueInfoProto) -> Option<usize> {
    let shape = input
        .r#type
        .as_ref()?
        .tensor_type
        .as_ref()?
        .shape
        .as_ref()?;
    match shape.dim.as_slice() {
        [_, width] if width.dim_value > 0 => usize::try_from(width.dim_value).ok(),
        _ => None,
    }
}

/// Ops on the score path after the operator that keep its meaning: the
/// margin explained is the same whichever of these outputs is named.
fn passes_scores(node: &NodeProto) -> bool {
    matches!(
        node.op_type.as_str(),
        "Identity" | "Cast" | "ZipMap" | "Normalizer"
    )
}

impl<'g> GraphView<'g> {
    fn new(graph: &'g GraphProto) -> GraphView<'g> {
        let mut producer = HashMap::new();
        let mut consumers: HashMap<&str, Vec<&NodeProto>> = HashMap::new();
        for node in &graph.node {
            for output in &node.output {
                producer.insert(output.as_str(), node);
            }
            for input in &node.input {
                consumers.entry(input.as_str()).or_default().push(node);
            }
        }
        GraphView {
            graph,
            producer,
            consumers,
        }
    }

    /// The one input that is not an initializer, of type float or double.
    fn single_input(&self) -> Result<&'g ValueInfoProto> {
        let initializers: Vec<&str> = self
            .graph
            .initializer
            .iter()
            .map(|t| t.name.as_str())
            .collect();
        let inputs: Vec<&ValueInfoProto> = self
            .graph
            .input
            .iter()
            .filter(|i| !initializers.contains(&i.name.as_str()))
            .collect();
        let &[input] = inputs.as_slice() else {
            return Err(refuse(format!(
                "the graph has {} inputs; one input of shape [batch, features] is needed",
                inputs.len()
            )));
        };
        match elem_type(input) {
            Some(FLOAT) | Some(DOUBLE) | None => Ok(input),
            Some(other) => Err(refuse(format!(
                "the input `{}` has element type {other}; float or double is needed",
                input.name
            ))),
        }
    }

    fn consumers(&self, tensor: &str) -> &[&'g NodeProto] {
        self.consumers.get(tensor).map_or(&[], Vec::as_slice)
    }

    /// Tensors the score tensor reaches through score-preserving ops.
    fn score_aliases(&self, score: &'g str) -> Vec<&'g str> {
        let mut out = vec![score];
        let mut at = 0;
        while at < out.len() {
            for node in self.consumers(out[at]) {
                if passes_scores(node) {
                    out.extend(node.output.iter().map(String::as_str));
                }
            }
            at += 1;
        }
        out
    }

    /// Every node is a folded step, the operator, or downstream of it.
    fn all_nodes_accounted(&self, chain: &[&NodeProto], core: &NodeProto) -> Option<String> {
        let mut downstream: Vec<&str> = core.output.iter().map(String::as_str).collect();
        let mut at = 0;
        while at < downstream.len() {
            for node in self.consumers(downstream[at]) {
                downstream.extend(node.output.iter().map(String::as_str));
            }
            at += 1;
        }
        self.graph
            .node
            .iter()
            .find(|node| {
                !std::ptr::eq(*node, core)
                    && !chain.iter().any(|c| std::ptr::eq(*c, *node))
                    && !node.input.iter().any(|i| downstream.contains(&i.as_str()))
            })
            .map(|node| {
                format!(
                    "node `{}` ({}) is neither a folded step nor after the operator",
                    node.name, node.op_type
                )
            })
    }

    fn mapped(
        &self,
        input: &'g ValueInfoProto,
        inputs: usize,
        choice: OnnxChoice<'_>,
    ) -> Result<Mapped> {
        // The service feeds a float input float32(x).
        let mut steps = Vec::new();
        let mut kind = match elem_type(input) {
            Some(DOUBLE) => Kind::F64,
            _ => {
                steps.push(Step::Round32);
                Kind::F32
            }
        };
        let mut chain: Vec<&NodeProto> = Vec::new();
        let mut tensor = input.name.as_str();
        let core = loop {
            let consumers = self.consumers(tensor);
            let &[node] = consumers else {
                return Ok(Mapped::Not(format!(
                    "tensor `{tensor}` feeds {} nodes, not one operator",
                    consumers.len()
                )));
            };
            if node.input.first().map(String::as_str) != Some(tensor) || node.output.is_empty() {
                return Ok(Mapped::Not(format!(
                    "node `{}` ({}) takes more than the features",
                    node.name, node.op_type
                )));
            }
            if node.domain == ML
                && matches!(
                    node.op_type.as_str(),
                    "TreeEnsembleRegressor"
                        | "TreeEnsembleClassifier"
                        | "LinearRegressor"
                        | "LinearClassifier"
                )
            {
                break node;
            }
            match Step::read(node, kind, inputs)? {
                Some((step, next)) => {
                    if let Some(step) = step {
                        steps.push(step);
                    }
                    kind = next;
                }
                None => {
                    return Ok(Mapped::Not(format!(
                        "node `{}` ({}{}) cannot be folded into a tree or linear operator",
                        node.name,
                        if node.domain.is_empty() {
                            ""
                        } else {
                            "ai.onnx.ml "
                        },
                        node.op_type
                    )));
                }
            }
            chain.push(node);
            tensor = &node.output[0];
        };
        if let Some(why) = self.all_nodes_accounted(&chain, core) {
            return Ok(Mapped::Not(why));
        }
        let classifier = core.op_type.ends_with("Classifier");
        let score = if classifier {
            core.output.get(1).ok_or_else(|| {
                refuse(format!(
                    "{} `{}` has no score output",
                    core.op_type, core.name
                ))
            })?
        } else {
            &core.output[0]
        };
        let aliases = self.score_aliases(score);
        let output = if choice.output.is_empty() {
            // Reported as the graph output the scores reach, if one does.
            aliases
                .iter()
                .find(|alias| self.is_graph_output(alias))
                .unwrap_or(&score.as_str())
                .to_string()
        } else if aliases.contains(&choice.output) {
            choice.output.to_string()
        } else if self.producer.contains_key(choice.output) || self.is_graph_output(choice.output) {
            return Err(EngineError::new(
                "onnx_output",
                format!(
                    "is {:?}, which is not the scores of {} `{}` (that is {score:?}); name the score output or leave it empty",
                    choice.output, core.op_type, core.name
                ),
            ));
        } else {
            return Err(EngineError::new(
                "onnx_output",
                format!("{:?} is not an output of the graph", choice.output),
            ));
        };
        let requested = match (choice.class_index, choice.output.is_empty()) {
            (Some(k), false) if k != choice.column => {
                return Err(EngineError::new(
                    "class_index",
                    format!(
                        "is {k} but onnx_output_column is {}; give the class once",
                        choice.column
                    ),
                ));
            }
            (Some(k), _) => Some(k),
            (None, false) => Some(choice.column),
            (None, true) => None,
        };
        let chain_names: Vec<&str> = chain.iter().map(|n| n.op_type.as_str()).collect();
        let folded = if chain_names.is_empty() {
            String::new()
        } else {
            format!(" after {}", chain_names.join(", "))
        };
        let attributes = Attributes(core);
        let post = attributes.text("post_transform")?.unwrap_or("NONE".into());
        if core.op_type.starts_with("Tree") {
            let trees = read_trees(core, &attributes, &steps, inputs, requested, &post)?;
            let trees = ImportedTrees {
                objective: format!("{} post_transform={post}{folded}", core.op_type),
                ..trees
            };
            Ok(Mapped::Trees(trees, output))
        } else {
            let linear = read_linear(core, &attributes, &steps, inputs, requested, &post)?;
            let linear = ImportedLinear {
                objective: format!("{} post_transform={post}{folded}", core.op_type),
                ..linear
            };
            Ok(Mapped::Linear(linear, output))
        }
    }

    fn is_graph_output(&self, name: &str) -> bool {
        self.graph.output.iter().any(|o| o.name == name)
    }

    /// The output the graph runtime reads: the named one unless it is a
    /// label, else the one float or double tensor output.
    fn graph_output(&self, named: &str) -> Result<(String, bool)> {
        let describe = |o: &ValueInfoProto| match elem_type(o) {
            Some(FLOAT) => format!("`{}` (float tensor)", o.name),
            Some(DOUBLE) => format!("`{}` (double tensor)", o.name),
            Some(INT64) => format!("`{}` (int64 tensor: labels)", o.name),
            Some(STRING) => format!("`{}` (string tensor: labels)", o.name),
            Some(other) => format!("`{}` (tensor of type {other})", o.name),
            None => format!("`{}` (a sequence or map, e.g. ZipMap's)", o.name),
        };
        let all: Vec<String> = self.graph.output.iter().map(describe).collect();
        let chosen = if named.is_empty() {
            let scores: Vec<&ValueInfoProto> = self
                .graph
                .output
                .iter()
                .filter(|o| matches!(elem_type(o), Some(FLOAT) | Some(DOUBLE)))
                .collect();
            match scores.as_slice() {
                [one] => one.name.clone(),
                [] => {
                    return Err(EngineError::new(
                        "onnx_output",
                        format!(
                            "is empty and no output of the graph is a float tensor (outputs: {}); export the scores as a tensor (for skl2onnx classifiers, the option zipmap=False)",
                            all.join(", ")
                        ),
                    ));
                }
                _ => {
                    return Err(EngineError::new(
                        "onnx_output",
                        format!(
                            "is empty but the graph has several score outputs ({}); name the one to explain",
                            all.join(", ")
                        ),
                    ));
                }
            }
        } else {
            if let Some(o) = self.graph.output.iter().find(|o| o.name == named)
                && matches!(elem_type(o), Some(INT64) | Some(STRING))
            {
                return Err(EngineError::new(
                    "onnx_output",
                    format!(
                        "names {}, which holds labels, not scores; the outputs are {}",
                        describe(o),
                        all.join(", ")
                    ),
                ));
            }
            named.to_string()
        };
        Ok((chosen.clone(), self.is_probability(&chosen)))
    }

    /// Whether `tensor` is made by an op whose results are probabilities,
    /// seen through reshaping and casting.
    fn is_probability(&self, tensor: &str) -> bool {
        let mut at = tensor;
        loop {
            let Some(node) = self.producer.get(at) else {
                return false;
            };
            match node.op_type.as_str() {
                "Sigmoid" | "Softmax" | "LogSoftmax" | "HardSigmoid" | "Normalizer" | "ZipMap" => {
                    return true;
                }
                "TreeEnsembleClassifier" | "LinearClassifier" | "SVMClassifier" => {
                    let post = Attributes(node).text("post_transform").ok().flatten();
                    return post.is_some_and(|p| p != "NONE");
                }
                "Identity" | "Cast" | "Reshape" | "Flatten" | "Squeeze" | "Unsqueeze" | "Slice"
                | "Gather" => match node.input.first() {
                    Some(input) => at = input,
                    None => return false,
                },
                _ => return false,
            }
        }
    }
}

/// The numeric type a tensor holds on the way to the operator.
#[derive(Debug, Clone, Copy, PartialEq)]
enum Kind {
    F32,
    F64,
}

/// One per-feature step in front of the operator, evaluated as ONNX
/// Runtime evaluates it (the reference the fixtures compare with).
#[derive(Debug, Clone)]
enum Step {
    /// Rounding to float32 (a float input, or `Cast` to float).
    Round32,
    /// `Scaler`: y = (x − offset) · scale, in float32 for a float input;
    /// the result is float32 either way.
    Scale {
        offset: Vec<f32>,
        scale: Vec<f32>,
        from: Kind,
    },
    /// `Imputer` of NaN: a missing value becomes the feature's value.
    Impute { values: Vec<f32> },
}

/// A per-feature attribute: one value for all, or one per feature.
fn per_feature(values: &[f32], j: usize) -> f32 {
    if values.len() == 1 {
        values[0]
    } else {
        values[j]
    }
}

impl Step {
    /// The step `node` stands for (None for a no-op) and the kind after it;
    /// Ok(None) when the node is no foldable step.
    fn read(node: &NodeProto, kind: Kind, inputs: usize) -> Result<Option<(Option<Step>, Kind)>> {
        let attributes = Attributes(node);
        let sized = |name: &str, values: Vec<f32>| -> Result<Vec<f32>> {
            if values.len() == 1 || values.len() == inputs {
                Ok(values)
            } else {
                Err(refuse(format!(
                    "node `{}` ({}): {name} has {} values for {inputs} features",
                    node.name,
                    node.op_type,
                    values.len()
                )))
            }
        };
        Ok(match (node.domain.as_str(), node.op_type.as_str()) {
            ("", "Identity") => Some((None, kind)),
            ("", "Cast") => match attributes.int("to")? {
                Some(v) if v == FLOAT as i64 => {
                    Some(((kind == Kind::F64).then_some(Step::Round32), Kind::F32))
                }
                // float32 → double is exact; double → double does nothing.
                Some(v) if v == DOUBLE as i64 => Some((None, Kind::F64)),
                _ => None,
            },
            (ML, "Scaler") => {
                let offset = sized("offset", attributes.floats("offset")?.unwrap_or(vec![0.0]))?;
                let scale = sized("scale", attributes.floats("scale")?.unwrap_or(vec![1.0]))?;
                if let Some(bad) = scale.iter().find(|s| **s == 0.0 || !s.is_finite()) {
                    return Err(refuse(format!(
                        "node `{}` (Scaler) has the scale {bad}; a zero or non-finite scale makes the feature constant or undefined, so it cannot be explained",
                        node.name
                    )));
                }
                if offset.iter().any(|o| !o.is_finite()) {
                    return Err(refuse(format!(
                        "node `{}` (Scaler) has a non-finite offset",
                        node.name
                    )));
                }
                Some((
                    Some(Step::Scale {
                        offset,
                        scale,
                        from: kind,
                    }),
                    Kind::F32,
                ))
            }
            (ML, "Imputer") if kind == Kind::F32 => {
                let replaced = attributes.float("replaced_value_float")?.unwrap_or(0.0);
                if !replaced.is_nan() {
                    return Err(refuse(format!(
                        "node `{}` (Imputer) replaces the value {replaced}, not NaN; only imputers of missing values (NaN) are folded",
                        node.name
                    )));
                }
                let values = sized(
                    "imputed_value_floats",
                    attributes
                        .floats("imputed_value_floats")?
                        .unwrap_or_default(),
                )?;
                Some((Some(Step::Impute { values }), Kind::F32))
            }
            _ => None,
        })
    }

    fn apply(&self, j: usize, x: f64) -> f64 {
        match self {
            Step::Round32 => x as f32 as f64,
            Step::Scale {
                offset,
                scale,
                from,
            } => {
                let (o, s) = (per_feature(offset, j), per_feature(scale, j));
                match from {
                    Kind::F32 => ((x as f32 - o) * s) as f64,
                    Kind::F64 => ((x - o as f64) * s as f64) as f32 as f64,
                }
            }
            Step::Impute { values } => {
                if x.is_nan() {
                    per_feature(values, j) as f64
                } else {
                    x
                }
            }
        }
    }
}

/// The folded steps of one feature, as a function of the double input.
struct Chain<'a> {
    steps: &'a [Step],
    feature: usize,
}

impl Chain<'_> {
    fn eval(&self, x: f64) -> f64 {
        self.steps
            .iter()
            .fold(x, |value, step| step.apply(self.feature, value))
    }

    /// Whether the chain grows with x (false: it falls); every step is
    /// monotone, and only a negative scale reverses the order.
    fn increasing(&self) -> bool {
        self.steps
            .iter()
            .filter(|step| match step {
                Step::Scale { scale, .. } => per_feature(scale, self.feature) < 0.0,
                _ => false,
            })
            .count()
            % 2
            == 0
    }
}

/// Doubles as keys whose unsigned order is the numeric order, −0 before
/// +0; −inf to +inf is a contiguous range holding no NaN.
fn key(x: f64) -> u64 {
    let bits = x.to_bits();
    if bits >> 63 == 1 {
        !bits
    } else {
        bits | 1 << 63
    }
}

fn from_key(k: u64) -> f64 {
    if k >> 63 == 1 {
        f64::from_bits(k & !(1 << 63))
    } else {
        f64::from_bits(!k)
    }
}

/// The smallest key in `[lo, hi)` where `pred` holds (`hi` if none), for a
/// `pred` that is false then true along the keys.
fn first_key(mut lo: u64, mut hi: u64, pred: impl Fn(u64) -> bool) -> u64 {
    while lo < hi {
        let mid = lo + (hi - lo) / 2;
        if pred(mid) {
            hi = mid;
        } else {
            lo = mid + 1;
        }
    }
    lo
}

#[derive(Debug, Clone, Copy, PartialEq)]
enum Mode {
    Leq,
    Lt,
    Gte,
    Gt,
    Eq,
    Neq,
}

impl Mode {
    fn read(mode: &str) -> Option<Mode> {
        Some(match mode {
            "BRANCH_LEQ" => Mode::Leq,
            "BRANCH_LT" => Mode::Lt,
            "BRANCH_GTE" => Mode::Gte,
            "BRANCH_GT" => Mode::Gt,
            "BRANCH_EQ" => Mode::Eq,
            "BRANCH_NEQ" => Mode::Neq,
            _ => return None,
        })
    }

    /// The operator's test: true goes to the true node. A NaN fails every
    /// comparison but `!=`, and goes true where missing values track true.
    fn goes_true(self, v: f64, t: f64, missing_tracks_true: bool) -> bool {
        let test = match self {
            Mode::Leq => v <= t,
            Mode::Lt => v < t,
            Mode::Gte => v >= t,
            Mode::Gt => v > t,
            Mode::Eq => v == t,
            Mode::Neq => v != t,
        };
        test || (missing_tracks_true && v.is_nan())
    }
}

/// A split of the graph as native pieces: along the doubles, the chain's
/// value is below, at, then above the threshold (reversed for a falling
/// chain), three runs at most, each found by bisection on the keys.
fn split_on_doubles(
    chain: &Chain<'_>,
    mode: Mode,
    threshold: f64,
    missing_tracks_true: bool,
    children: (usize, usize),
) -> Split {
    let (true_child, false_child) = children;
    let child = |x: f64| {
        if mode.goes_true(chain.eval(x), threshold, missing_tracks_true) {
            true_child
        } else {
            false_child
        }
    };
    // rank: 0 before the threshold, 1 at it, 2 past it, in the order of x.
    let increasing = chain.increasing();
    let rank = |k: u64| {
        let v = chain.eval(from_key(k));
        let (before, after) = if increasing {
            (v < threshold, v > threshold)
        } else {
            (v > threshold, v < threshold)
        };
        if before {
            0
        } else if after {
            2
        } else {
            1
        }
    };
    let (lo, hi) = (key(f64::NEG_INFINITY), key(f64::INFINITY) + 1);
    let at = first_key(lo, hi, |k| rank(k) >= 1);
    let past = first_key(at, hi, |k| rank(k) >= 2);
    let mut pieces: Vec<(f64, usize)> = Vec::new();
    let mut current: Option<usize> = None;
    for (start, end) in [(lo, at), (at, past), (past, hi)] {
        if start >= end {
            continue;
        }
        let goes = child(from_key(start));
        match current {
            Some(previous) if previous == goes => {}
            Some(previous) => {
                pieces.push((from_key(start), previous));
                current = Some(goes);
            }
            None => current = Some(goes),
        }
    }
    Split {
        feature: chain.feature as i32,
        pieces,
        last: current.unwrap_or(false_child),
        missing: child(f64::NAN),
    }
}

/// Attribute access by name.
struct Attributes<'n>(&'n NodeProto);

impl Attributes<'_> {
    fn get(&self, name: &str) -> Option<&AttributeProto> {
        self.0.attribute.iter().find(|a| a.name == name)
    }

    fn text(&self, name: &str) -> Result<Option<String>> {
        self.get(name)
            .map(|a| {
                String::from_utf8(a.s.clone()).map_err(|_| {
                    refuse(format!(
                        "node `{}`: attribute {name} is not UTF-8",
                        self.0.name
                    ))
                })
            })
            .transpose()
    }

    fn int(&self, name: &str) -> Result<Option<i64>> {
        Ok(self.get(name).map(|a| a.i))
    }

    fn float(&self, name: &str) -> Result<Option<f32>> {
        Ok(self.get(name).map(|a| a.f))
    }

    fn floats(&self, name: &str) -> Result<Option<Vec<f32>>> {
        Ok(self.get(name).map(|a| a.floats.clone()))
    }

    fn ints(&self, name: &str) -> Vec<i64> {
        self.get(name).map(|a| a.ints.clone()).unwrap_or_default()
    }

    fn strings(&self, name: &str) -> Vec<String> {
        self.get(name)
            .map(|a| {
                a.strings
                    .iter()
                    .map(|s| String::from_utf8_lossy(s).into_owned())
                    .collect()
            })
            .unwrap_or_default()
    }

    /// `name_as_tensor` (double) if present, else `name` (float).
    fn numbers(&self, name: &str) -> Result<Option<Vec<f64>>> {
        if let Some(tensor) = self
            .get(&format!("{name}_as_tensor"))
            .and_then(|a| a.t.as_ref())
        {
            return tensor.numbers().map(Some).ok_or_else(|| {
                refuse(format!(
                    "node `{}`: {name}_as_tensor is not a float or double tensor",
                    self.0.name
                ))
            });
        }
        Ok(self
            .floats(name)?
            .map(|v| v.into_iter().map(f64::from).collect()))
    }
}

/// How the operator's scores become outputs: the link of the margin.
fn link_of(op: &str, post: &str) -> Result<Link> {
    match post {
        "NONE" | "SOFTMAX" | "SOFTMAX_ZERO" => Ok(Link::Identity),
        "LOGISTIC" => Ok(Link::Logistic),
        other => Err(refuse(format!(
            "{op} has post_transform {other}; NONE, LOGISTIC, SOFTMAX and SOFTMAX_ZERO are imported"
        ))),
    }
}

fn read_trees(
    core: &NodeProto,
    attributes: &Attributes<'_>,
    steps: &[Step],
    inputs: usize,
    requested: Option<u32>,
    post: &str,
) -> Result<ImportedTrees> {
    let op = core.op_type.as_str();
    let classifier = op == "TreeEnsembleClassifier";
    let name = |n: &str| format!("{op} `{}`: {n}", core.name);
    let tree_ids = attributes.ints("nodes_treeids");
    let node_ids = attributes.ints("nodes_nodeids");
    let features = attributes.ints("nodes_featureids");
    let modes = attributes.strings("nodes_modes");
    let values = attributes.numbers("nodes_values")?.unwrap_or_default();
    let true_ids = attributes.ints("nodes_truenodeids");
    let false_ids = attributes.ints("nodes_falsenodeids");
    let mut tracks = attributes.ints("nodes_missing_value_tracks_true");
    let n = node_ids.len();
    if tracks.is_empty() {
        tracks = vec![0; n];
    }
    for (what, len) in [
        ("nodes_treeids", tree_ids.len()),
        ("nodes_featureids", features.len()),
        ("nodes_modes", modes.len()),
        ("nodes_values", values.len()),
        ("nodes_truenodeids", true_ids.len()),
        ("nodes_falsenodeids", false_ids.len()),
        ("nodes_missing_value_tracks_true", tracks.len()),
    ] {
        if len != n {
            return Err(refuse(name(&format!(
                "{what} has {len} entries for {n} nodes"
            ))));
        }
    }
    let prefix = if classifier { "class" } else { "target" };
    let weight_trees = attributes.ints(&format!("{prefix}_treeids"));
    let weight_nodes = attributes.ints(&format!("{prefix}_nodeids"));
    let weight_ids = attributes.ints(&format!("{prefix}_ids"));
    let weights = attributes
        .numbers(&format!("{prefix}_weights"))?
        .unwrap_or_default();
    if [weight_nodes.len(), weight_ids.len(), weights.len()] != [weight_trees.len(); 3] {
        return Err(refuse(name(&format!(
            "the {prefix}_* arrays differ in length"
        ))));
    }
    let outputs = if classifier {
        let labels = attributes
            .ints("classlabels_int64s")
            .len()
            .max(attributes.strings("classlabels_strings").len());
        if labels == 0 {
            return Err(refuse(name("has no class labels")));
        }
        labels
    } else {
        usize::try_from(attributes.int("n_targets")?.unwrap_or(1).max(1)).unwrap_or(1)
    };
    if let Some(bad) = weight_ids.iter().find(|&&k| k < 0 || k as usize >= outputs) {
        return Err(refuse(name(&format!(
            "{prefix}_ids holds {bad}, outside 0..{outputs}"
        ))));
    }
    let aggregate = attributes
        .text("aggregate_function")?
        .unwrap_or("SUM".into());
    if aggregate != "SUM" && aggregate != "AVERAGE" {
        return Err(refuse(name(&format!(
            "aggregate_function is {aggregate}; only SUM and AVERAGE are sums of trees, which the exact tree algorithm needs"
        ))));
    }
    let link = link_of(op, post)?;
    let base_values = attributes.numbers("base_values")?.unwrap_or_default();
    let mut scored: Vec<i64> = weight_ids.clone();
    scored.sort_unstable();
    scored.dedup();
    // A binary classifier may score one class only (as skl2onnx writes
    // gradient boosting): its score s is class 1's margin, and under the
    // logistic transform class 0's is −s (σ(−s) = 1 − σ(s)).
    let one_score = classifier && outputs == 2 && scored == [0];
    if classifier && outputs == 2 && scored == [1] {
        // onnxruntime derives class 0 from class 1's score by rules the
        // specification leaves open; skl2onnx never writes this form.
        return Err(refuse(name(
            "scores class 1 only of two classes; write the scores under class id 0 (as skl2onnx does) or score both classes",
        )));
    }
    let objective_for_class = format!("{op} with {outputs} outputs");
    let class = choose_class(requested, outputs, &objective_for_class)?;
    if one_score && class == 0 && link != Link::Logistic {
        return Err(EngineError::new(
            "class_index",
            format!(
                "is 0, but {op} `{}` scores one class of two with post_transform {post}: only class 1 has a margin",
                core.name
            ),
        ));
    }
    let read_id = if one_score { 0 } else { class as i64 };
    let base = match (base_values.len(), one_score) {
        (0, _) => 0.0,
        (1, true) => base_values[0],
        (len, false) if len == outputs => base_values[class as usize],
        (1, false) if outputs == 1 => base_values[0],
        (len, _) => {
            return Err(refuse(name(&format!(
                "base_values has {len} values for {outputs} outputs"
            ))));
        }
    };

    // Nodes by tree, in the order trees first appear.
    let mut tree_order: Vec<i64> = Vec::new();
    let mut by_tree: HashMap<i64, HashMap<i64, usize>> = HashMap::new();
    for i in 0..n {
        let entry = by_tree.entry(tree_ids[i]).or_insert_with(|| {
            tree_order.push(tree_ids[i]);
            HashMap::new()
        });
        if entry.insert(node_ids[i], i).is_some() {
            return Err(refuse(name(&format!(
                "tree {}, node {} appears twice",
                tree_ids[i], node_ids[i]
            ))));
        }
    }
    let mut leaf_value: HashMap<(i64, i64), f64> = HashMap::new();
    for w in 0..weights.len() {
        if weight_ids[w] == read_id {
            *leaf_value
                .entry((weight_trees[w], weight_nodes[w]))
                .or_default() += weights[w];
        }
    }
    let divide = if aggregate == "AVERAGE" {
        tree_order.len().max(1) as f64
    } else {
        1.0
    };
    let chains: Vec<Chain<'_>> = (0..inputs)
        .map(|feature| Chain { steps, feature })
        .collect();
    let mut trees: Vec<TreeBody> = Vec::with_capacity(tree_order.len());
    for (t, tree_id) in tree_order.iter().enumerate() {
        let nodes = &by_tree[tree_id];
        let root = nodes
            .get(&0)
            .copied()
            .ok_or_else(|| refuse(name(&format!("tree {tree_id} has no node 0"))))?;
        let child = |id: i64| -> Result<usize> {
            nodes.get(&id).copied().ok_or_else(|| {
                refuse(name(&format!(
                    "tree {tree_id} points to node {id}, which it does not have"
                )))
            })
        };
        let node = |i: usize| -> Result<SourceNode> {
            if modes[i] == "LEAF" {
                let value = leaf_value
                    .get(&(*tree_id, node_ids[i]))
                    .copied()
                    .unwrap_or(0.0);
                return Ok(SourceNode::Leaf(value / divide));
            }
            let mode = Mode::read(&modes[i]).ok_or_else(|| {
                refuse(name(&format!(
                    "tree {tree_id}, node {}: mode {:?} is not one the standard defines",
                    node_ids[i], modes[i]
                )))
            })?;
            let feature = usize::try_from(features[i])
                .ok()
                .filter(|&f| f < inputs)
                .ok_or_else(|| {
                    refuse(name(&format!(
                        "tree {tree_id}, node {} tests feature {} of {inputs}",
                        node_ids[i], features[i]
                    )))
                })?;
            if values[i].is_nan() {
                return Err(refuse(name(&format!(
                    "tree {tree_id}, node {} has a NaN threshold",
                    node_ids[i]
                ))));
            }
            Ok(SourceNode::Split(split_on_doubles(
                &chains[feature],
                mode,
                values[i],
                tracks[i] != 0,
                (child(true_ids[i])?, child(false_ids[i])?),
            )))
        };
        trees.push(build_tree(FIELD, t, n, root, node)?);
    }
    let mut base_score = base;
    if one_score && class == 0 {
        negate(&mut trees, &mut base_score);
    }
    Ok(ImportedTrees {
        trees,
        base_score,
        link,
        feature_names: Vec::new(),
        objective: String::new(),
        class_index: class,
    })
}

fn read_linear(
    core: &NodeProto,
    attributes: &Attributes<'_>,
    steps: &[Step],
    inputs: usize,
    requested: Option<u32>,
    post: &str,
) -> Result<ImportedLinear> {
    let op = core.op_type.as_str();
    let name = |n: &str| format!("{op} `{}`: {n}", core.name);
    if steps.iter().any(|s| matches!(s, Step::Impute { .. })) {
        return Err(refuse(name(
            "follows an Imputer; a linear model takes no missing values, so impute before calling and export the model without the imputer",
        )));
    }
    let coefficients = attributes.floats("coefficients")?.unwrap_or_default();
    let intercepts = attributes.floats("intercepts")?.unwrap_or_default();
    if coefficients.is_empty() || coefficients.len() % inputs != 0 {
        return Err(refuse(name(&format!(
            "has {} coefficients for {inputs} features",
            coefficients.len()
        ))));
    }
    let rows = coefficients.len() / inputs;
    let outputs = if op == "LinearClassifier" {
        attributes
            .ints("classlabels_ints")
            .len()
            .max(attributes.strings("classlabels_strings").len())
    } else {
        usize::try_from(attributes.int("targets")?.unwrap_or(1).max(1)).unwrap_or(1)
    };
    if rows != outputs {
        return Err(refuse(name(&format!(
            "has {rows} coefficient rows for {outputs} outputs; one row per class or target is imported"
        ))));
    }
    if !intercepts.is_empty() && intercepts.len() != rows {
        return Err(refuse(name(&format!(
            "has {} intercepts for {rows} rows",
            intercepts.len()
        ))));
    }
    if op == "LinearRegressor" && post != "NONE" {
        return Err(refuse(name(&format!(
            "has post_transform {post}; a regressor is imported with NONE only"
        ))));
    }
    let link = link_of(op, post)?;
    let class = choose_class(requested, outputs, &format!("{op} with {outputs} outputs"))?;
    let row = &coefficients[class as usize * inputs..(class as usize + 1) * inputs];
    let mut weights: Vec<f64> = row.iter().map(|&w| f64::from(w)).collect();
    let mut intercept = intercepts
        .get(class as usize)
        .map_or(0.0, |&b| f64::from(b));
    // Steps act from the input outwards, so they fold from the operator
    // back: w · ((x − o) s) + b = (w s) · x + (b − Σ w s o).
    for step in steps.iter().rev() {
        if let Step::Scale { offset, scale, .. } = step {
            for (j, w) in weights.iter_mut().enumerate() {
                let (o, s) = (
                    f64::from(per_feature(offset, j)),
                    f64::from(per_feature(scale, j)),
                );
                *w *= s;
                intercept -= *w * o;
            }
        }
    }
    Ok(ImportedLinear {
        weights,
        intercept,
        link,
        feature_names: Vec::new(),
        objective: String::new(),
        class_index: class,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The keys order doubles as IEEE 754 orders them (common practice, no
    /// source: the sign-magnitude to two's-complement trick).
    #[test]
    fn keys_follow_numeric_order() {
        let xs = [
            f64::NEG_INFINITY,
            -1e300,
            -1.0,
            -f64::MIN_POSITIVE,
            -0.0,
            0.0,
            f64::from_bits(1),
            1.0,
            f64::MAX,
            f64::INFINITY,
        ];
        for w in xs.windows(2) {
            assert!(key(w[0]) < key(w[1]), "{} {}", w[0], w[1]);
        }
        for x in xs {
            assert_eq!(from_key(key(x)).to_bits(), x.to_bits());
        }
    }

    /// Every native split equals the operator's test on doubles around the
    /// threshold, for every mode, rising and falling chains, float32 and
    /// double kinds; checked against the test written out directly
    /// (the ai.onnx.ml specification's node modes).
    #[test]
    fn splits_decide_as_the_operator_on_every_probe() {
        let chains: Vec<Vec<Step>> = vec![
            vec![],
            vec![Step::Round32],
            vec![
                Step::Round32,
                Step::Scale {
                    offset: vec![0.3],
                    scale: vec![-1.7],
                    from: Kind::F32,
                },
            ],
            vec![Step::Scale {
                offset: vec![-2.5],
                scale: vec![0.01],
                from: Kind::F64,
            }],
            vec![Step::Round32, Step::Impute { values: vec![0.75] }],
        ];
        let modes = [
            Mode::Leq,
            Mode::Lt,
            Mode::Gte,
            Mode::Gt,
            Mode::Eq,
            Mode::Neq,
        ];
        for steps in &chains {
            let chain = Chain { steps, feature: 0 };
            for threshold in [0.75f32 as f64, -0.1f32 as f64, 0.1, 3.0] {
                for mode in modes {
                    for tracks in [false, true] {
                        let split = split_on_doubles(&chain, mode, threshold, tracks, (1, 2));
                        let native = |x: f64| {
                            if x.is_nan() {
                                return split.missing;
                            }
                            split
                                .pieces
                                .iter()
                                .find(|p| x < p.0)
                                .map_or(split.last, |p| p.1)
                        };
                        let mut probes = vec![f64::NAN, f64::INFINITY, f64::NEG_INFINITY, 0.0];
                        for &(centre, _) in &split.pieces {
                            let mut x = centre;
                            for _ in 0..4 {
                                x = x.next_down();
                            }
                            for _ in 0..9 {
                                probes.push(x);
                                x = x.next_up();
                            }
                        }
                        for x in [threshold, 0.3 + threshold / -1.7, threshold * 100.0 - 2.5] {
                            probes.extend([x, x.next_up(), x.next_down()]);
                        }
                        for x in probes {
                            let want = if mode.goes_true(chain.eval(x), threshold, tracks) {
                                1
                            } else {
                                2
                            };
                            assert_eq!(native(x), want, "{mode:?} t={threshold} x={x}");
                        }
                    }
                }
            }
        }
    }
}
