//! Wire types ↔ registry and engine types. Protobuf stops here: every
//! conversion into the engine validates what the engine cannot see (enum
//! values, options given to the wrong choice, matrix shapes) and names the
//! API field at fault.

use std::sync::Arc;
use std::time::Duration;

use ndarray::Array2;

use super::proto;
use super::status::ServiceError;
use crate::engine::estimate::boundary::Goal;
use crate::engine::job::{self, RemovalChoice, Request};
use crate::engine::{EstimatorKind, Kernel, Players, Summary, Target};
use crate::model::Link;
use crate::model::import::{self, ImportedTrees};
use crate::reasons::{self, Decision, Favourable, Outcome, Space};
use crate::registry::{
    Background, Entry, FeatureSpec, ImportFormat, ImportSpec, LinkSpec, MAX_BACKGROUND_BYTES,
    MAX_BACKGROUND_ROWS, MAX_ONNX_BYTES, ModelBody, ModelInfo, ModelSpec, RegistryError, TreeBody,
};

/// Evaluation cap when the request gives none.
pub const DEFAULT_MAX_EVALUATIONS: u64 = 1 << 20;

type Result<T> = std::result::Result<T, ServiceError>;

/// A known value of a proto enum, or INVALID_ARGUMENT naming `field`.
fn known<E: TryFrom<i32>>(field: &str, value: i32) -> Result<E> {
    E::try_from(value).map_err(|_| {
        ServiceError::invalid(field, format!("{value} is not a known value of this enum"))
    })
}

impl From<proto::Link> for LinkSpec {
    fn from(link: proto::Link) -> LinkSpec {
        match link {
            proto::Link::Identity => LinkSpec::Identity,
            proto::Link::Logistic => LinkSpec::Logistic,
        }
    }
}

impl From<Link> for proto::Link {
    fn from(link: Link) -> proto::Link {
        match link {
            Link::Identity => proto::Link::Identity,
            Link::Logistic => proto::Link::Logistic,
        }
    }
}

impl From<proto::Feature> for FeatureSpec {
    fn from(feature: proto::Feature) -> FeatureSpec {
        FeatureSpec {
            name: feature.name,
            group: feature.group,
            reason_code: feature.reason_code,
            reason_text: feature.reason_text,
        }
    }
}

impl From<&FeatureSpec> for proto::Feature {
    fn from(feature: &FeatureSpec) -> proto::Feature {
        proto::Feature {
            name: feature.name.clone(),
            group: feature.group.clone(),
            reason_code: feature.reason_code.clone(),
            reason_text: feature.reason_text.clone(),
        }
    }
}

/// Checks a matrix's shape against its values and the size limits before
/// anything is allocated for it.
fn checked_shape(field: &str, matrix: &proto::Matrix) -> Result<(usize, usize)> {
    let (rows, cols) = (matrix.rows as usize, matrix.cols as usize);
    if rows > MAX_BACKGROUND_ROWS {
        return Err(ServiceError::invalid(
            field,
            format!("{rows} rows exceed the limit of {MAX_BACKGROUND_ROWS}; send a smaller sample"),
        ));
    }
    let bytes = matrix
        .values
        .len()
        .saturating_mul(std::mem::size_of::<f64>());
    if bytes > MAX_BACKGROUND_BYTES {
        return Err(ServiceError::invalid(
            field,
            format!(
                "{bytes} bytes of values exceed the limit of {MAX_BACKGROUND_BYTES}; send a smaller sample"
            ),
        ));
    }
    if rows.checked_mul(cols) != Some(matrix.values.len()) {
        return Err(ServiceError::invalid(
            field,
            format!(
                "rows × cols = {rows} × {cols} but {} values were sent; send rows × cols values, row-major",
                matrix.values.len()
            ),
        ));
    }
    if rows == 0 || cols == 0 {
        return Err(ServiceError::invalid(
            field,
            "needs at least one row and one column",
        ));
    }
    Ok((rows, cols))
}

/// Refuses NaN and infinities in a matrix whose shape has been checked.
/// (A background may hold NaN for models that take missing values; the
/// registry decides that, knowing the model.)
fn require_finite(field: &str, matrix: &proto::Matrix, cols: usize) -> Result<()> {
    match matrix.values.iter().position(|v| !v.is_finite()) {
        Some(index) => Err(ServiceError::invalid(
            field,
            format!(
                "value {index} (row {}, column {}) is not finite",
                index / cols,
                index % cols
            ),
        )),
        None => Ok(()),
    }
}

impl TryFrom<proto::RegisterModelRequest> for ModelSpec {
    type Error = ServiceError;

    fn try_from(request: proto::RegisterModelRequest) -> Result<ModelSpec> {
        use proto::register_model_request::Model;
        let requested_link = known::<proto::Link>("link", request.link)?;
        let mut features: Vec<FeatureSpec> = request
            .features
            .into_iter()
            .map(FeatureSpec::from)
            .collect();
        let imported = matches!(
            request.model,
            Some(Model::XgboostJson(_)) | Some(Model::LightgbmText(_)) | Some(Model::Onnx(_))
        );
        if request.class_index.is_some() && !imported {
            return Err(ServiceError::invalid(
                "class_index",
                "applies to `onnx`, `xgboost_json` and `lightgbm_text` models only; leave it unset",
            ));
        }
        let (model, link, imported) = match request.model {
            Some(Model::Linear(linear)) => (
                ModelBody::Linear {
                    weights: linear.weights,
                    intercept: linear.intercept,
                },
                LinkSpec::from(requested_link),
                None,
            ),
            Some(Model::Trees(ensemble)) => (
                ModelBody::Trees {
                    trees: ensemble
                        .trees
                        .into_iter()
                        .map(|tree| TreeBody {
                            feature: tree.feature,
                            threshold: tree.threshold,
                            left: tree.left,
                            right: tree.right,
                            value: tree.value,
                            missing_left: tree.missing_left,
                        })
                        .collect(),
                    base_score: ensemble.base_score,
                },
                LinkSpec::from(requested_link),
                None,
            ),
            Some(Model::Onnx(graph)) => onnx_model(
                graph,
                import::OnnxChoice {
                    output: &request.onnx_output,
                    column: request.onnx_output_column,
                    class_index: request.class_index,
                    features: features.len(),
                },
                requested_link,
                &mut features,
            )?,
            Some(Model::XgboostJson(bytes)) => native_trees(
                ImportFormat::XgboostJson,
                import::xgboost_json(&bytes, request.class_index)?,
                requested_link,
                &mut features,
            )?,
            Some(Model::LightgbmText(bytes)) => native_trees(
                ImportFormat::LightgbmText,
                import::lightgbm_text(&bytes, request.class_index)?,
                requested_link,
                &mut features,
            )?,
            None => {
                return Err(ServiceError::invalid(
                    "model",
                    "no model given; set one of `linear`, `trees`, `onnx`, `xgboost_json` or `lightgbm_text`",
                ));
            }
        };
        let matrix = request.background.ok_or_else(|| {
            ServiceError::invalid(
                "background",
                "is required: at least one row of reference values",
            )
        })?;
        let (rows, cols) = checked_shape("background", &matrix)?;
        Ok(ModelSpec {
            model_id: request.model_id,
            features,
            model,
            link,
            background: Background {
                rows,
                cols,
                values: matrix.values,
            },
            description: request.description,
            imported,
            decision: request.decision.map(decision_from).transpose()?.flatten(),
        })
    }
}

/// The registered decision; all defaults (higher is favourable, no space,
/// no threshold) is no decision, so such records keep their bytes.
fn decision_from(decision: proto::Decision) -> Result<Option<Decision>> {
    let favourable = match known::<proto::Favourable>("decision.favourable", decision.favourable)? {
        proto::Favourable::Unspecified | proto::Favourable::Higher => Favourable::Higher,
        proto::Favourable::Lower => Favourable::Lower,
    };
    let space = space_from("decision.space", decision.space)?;
    let decision = Decision {
        favourable,
        space,
        threshold: decision.threshold,
    };
    Ok((decision != Decision::default()).then_some(decision))
}

fn space_from(field: &str, space: i32) -> Result<Option<Space>> {
    Ok(match known::<proto::DecisionSpace>(field, space)? {
        proto::DecisionSpace::Unspecified => None,
        proto::DecisionSpace::Output => Some(Space::Output),
        proto::DecisionSpace::Probability => Some(Space::Probability),
    })
}

/// An imported file as the native trees the registry stores (no new stored
/// format). The objective decides the link; since LINK_IDENTITY is also the
/// unset value, only an explicit LINK_LOGISTIC can contradict it. Feature
/// names come from the file unless the request gives its own, one per input.
/// What was read (format, objective, class) is kept with the registration.
fn native_trees(
    format: ImportFormat,
    imported: ImportedTrees,
    requested_link: proto::Link,
    features: &mut Vec<FeatureSpec>,
) -> Result<(ModelBody, LinkSpec, Option<ImportSpec>)> {
    check_link(requested_link, imported.link, &imported.objective)?;
    // A graph's width was checked against the features already; its names
    // are given only when the request has none.
    if features.is_empty() || !imported.feature_names.is_empty() {
        let inputs = imported.feature_names.len();
        take_names(features, imported.feature_names, inputs)?;
    }
    Ok((
        ModelBody::Trees {
            trees: imported.trees,
            base_score: imported.base_score,
        },
        LinkSpec::from(imported.link),
        Some(ImportSpec {
            format,
            objective: imported.objective,
            class_index: imported.class_index,
            output: String::new(),
        }),
    ))
}

/// An ONNX graph: native trees or a linear model when it is one ai.onnx.ml
/// operator behind foldable steps, else the graph itself for the runtime,
/// reading the output chosen by type. A logistic link on an output that is
/// already a probability is refused, not applied twice.
fn onnx_model(
    graph: Vec<u8>,
    choice: import::OnnxChoice<'_>,
    requested_link: proto::Link,
    features: &mut Vec<FeatureSpec>,
) -> Result<(ModelBody, LinkSpec, Option<ImportSpec>)> {
    if graph.len() > MAX_ONNX_BYTES {
        return Err(RegistryError::TooLarge {
            field: "onnx".to_string(),
            actual: graph.len() as u64,
            limit: MAX_ONNX_BYTES as u64,
            unit: "bytes",
            fix: "register a smaller graph",
        }
        .into());
    }
    match import::onnx_graph(&graph, choice)? {
        import::OnnxImport::Trees { trees, output } => {
            let (body, link, spec) =
                native_trees(ImportFormat::Onnx, trees, requested_link, features)?;
            Ok((body, link, spec.map(|spec| ImportSpec { output, ..spec })))
        }
        import::OnnxImport::Linear { linear, output } => {
            check_link(requested_link, linear.link, &linear.objective)?;
            take_names(features, linear.feature_names, linear.weights.len())?;
            Ok((
                ModelBody::Linear {
                    weights: linear.weights,
                    intercept: linear.intercept,
                },
                LinkSpec::from(linear.link),
                Some(ImportSpec {
                    format: ImportFormat::Onnx,
                    objective: linear.objective,
                    class_index: linear.class_index,
                    output,
                }),
            ))
        }
        import::OnnxImport::Graph {
            output,
            probability,
            feature_names,
            why,
        } => {
            if cfg!(not(feature = "onnx")) {
                return Err(ServiceError::Unimplemented(format!(
                    "onnx: the graph is not one tree or linear operator ({why}), and this build has no ONNX runtime (built without the `onnx` feature)"
                )));
            }
            if probability && requested_link == proto::Link::Logistic {
                return Err(ServiceError::invalid(
                    "link",
                    format!(
                        "is LINK_LOGISTIC, but the output `{output}` is already a probability; leave `link` unset and use TARGET_OUTPUT, or name the graph's raw score output"
                    ),
                ));
            }
            if choice.class_index.is_some() {
                return Err(ServiceError::invalid(
                    "class_index",
                    "applies to graphs imported as native trees or linear models; for a graph run as it is, pick the column with onnx_output_column",
                ));
            }
            tracing::info!(%why, %output, "ONNX graph runs in the graph runtime");
            if features.is_empty() {
                let inputs = feature_names.len();
                take_names(features, feature_names, inputs)?;
            }
            Ok((
                ModelBody::Onnx {
                    graph,
                    output,
                    column: choice.column as usize,
                },
                LinkSpec::from(requested_link),
                None,
            ))
        }
    }
}

/// LINK_IDENTITY is also the unset value, so only an explicit LINK_LOGISTIC
/// can contradict the link a file implies.
fn check_link(requested: proto::Link, implied: Link, objective: &str) -> Result<()> {
    if requested == proto::Link::Logistic && implied != Link::Logistic {
        return Err(ServiceError::invalid(
            "link",
            format!(
                "is LINK_LOGISTIC, but `{objective}` gives a margin on the identity scale; leave `link` unset"
            ),
        ));
    }
    Ok(())
}

/// Feature names from the file when the request gives none; otherwise the
/// request must give one per input.
fn take_names(features: &mut Vec<FeatureSpec>, names: Vec<String>, inputs: usize) -> Result<()> {
    if features.is_empty() {
        *features = names
            .into_iter()
            .map(|name| FeatureSpec {
                name,
                group: String::new(),
                reason_code: String::new(),
                reason_text: String::new(),
            })
            .collect();
    } else if features.len() != inputs {
        return Err(ServiceError::invalid(
            "features",
            format!(
                "has {} entries, but the model file has {inputs} inputs; give one per input or none to use the file's names",
                features.len()
            ),
        ));
    }
    Ok(())
}

/// Players none of whose features carries a reason statement.
fn unstated_players(features: &[FeatureSpec]) -> Vec<String> {
    let names: Vec<String> = features.iter().map(|f| f.name.clone()).collect();
    let groups: Vec<String> = features.iter().map(|f| f.group.clone()).collect();
    let Ok(players) = Players::try_new(&names, &groups) else {
        return Vec::new();
    };
    (0..players.len())
        .filter(|&p| {
            players
                .members(p)
                .iter()
                .all(|&f| features[f].reason_text.is_empty())
        })
        .map(|p| players.names()[p].clone())
        .collect()
}

impl From<Decision> for proto::Decision {
    fn from(decision: Decision) -> proto::Decision {
        proto::Decision {
            favourable: match decision.favourable {
                Favourable::Higher => proto::Favourable::Higher,
                Favourable::Lower => proto::Favourable::Lower,
            } as i32,
            space: match decision.space {
                None => proto::DecisionSpace::Unspecified,
                Some(Space::Output) => proto::DecisionSpace::Output,
                Some(Space::Probability) => proto::DecisionSpace::Probability,
            } as i32,
            threshold: decision.threshold,
        }
    }
}

/// Player names of a feature list, in attribution order. Registered
/// features always form valid players; anything else gives none.
fn player_names(features: &[FeatureSpec]) -> Vec<String> {
    let names: Vec<String> = features.iter().map(|f| f.name.clone()).collect();
    let groups: Vec<String> = features.iter().map(|f| f.group.clone()).collect();
    Players::try_new(&names, &groups)
        .map(|players| players.names().to_vec())
        .unwrap_or_default()
}

impl From<&ModelInfo> for proto::ModelInfo {
    fn from(info: &ModelInfo) -> proto::ModelInfo {
        proto::ModelInfo {
            model_id: info.model_id.clone(),
            version: info.version,
            features: info.features.iter().map(proto::Feature::from).collect(),
            background_rows: u32::try_from(info.background_rows).unwrap_or(u32::MAX),
            model_kind: info.model_kind.to_string(),
            link: proto::Link::from(info.link) as i32,
            row_cost_ns: info.row_cost_ns,
            registered_unix_ms: i64::try_from(info.registered_unix_ms).unwrap_or(i64::MAX),
            checksum: info.checksum.clone(),
            description: info.description.clone(),
            players: player_names(&info.features),
            preparation_ms: info.preparation_ms,
            prepared_bytes: info.prepared_bytes,
            import_format: info
                .imported
                .as_ref()
                .map(|imported| imported.format.as_str().to_string())
                .unwrap_or_default(),
            import_objective: info
                .imported
                .as_ref()
                .map(|imported| imported.objective.clone())
                .unwrap_or_default(),
            import_class_index: info.imported.as_ref().map(|imported| imported.class_index),
            import_output: match &info.imported {
                Some(imported) => imported.output.clone(),
                None => info.graph_output.clone().unwrap_or_default(),
            },
            decision: Some(proto::Decision::from(info.decision.unwrap_or_default())),
            warnings: unstated_players(&info.features)
                .into_iter()
                .map(|name| {
                    format!(
                        "player {name:?} has no reason statement, so it is never listed as a reason"
                    )
                })
                .collect(),
        }
    }
}

/// AUTO is no estimator: the planner chooses.
impl From<proto::Estimator> for Option<EstimatorKind> {
    fn from(estimator: proto::Estimator) -> Option<EstimatorKind> {
        match estimator {
            proto::Estimator::Auto => None,
            proto::Estimator::Exact => Some(EstimatorKind::Exact),
            proto::Estimator::Permutation => Some(EstimatorKind::Permutation),
            proto::Estimator::PairedRegression => Some(EstimatorKind::PairedRegression),
            proto::Estimator::LeverageRegression => Some(EstimatorKind::LeverageRegression),
            proto::Estimator::Msr => Some(EstimatorKind::MaximumSampleReuse),
            proto::Estimator::TreeExact => Some(EstimatorKind::TreeExact),
            proto::Estimator::LinearExact => Some(EstimatorKind::LinearExact),
            proto::Estimator::RowPermutation => Some(EstimatorKind::RowPermutation),
            proto::Estimator::TreeRowSample => Some(EstimatorKind::TreeRowSample),
        }
    }
}

impl From<EstimatorKind> for proto::Estimator {
    fn from(kind: EstimatorKind) -> proto::Estimator {
        match kind {
            EstimatorKind::Exact => proto::Estimator::Exact,
            EstimatorKind::Permutation => proto::Estimator::Permutation,
            EstimatorKind::PairedRegression => proto::Estimator::PairedRegression,
            EstimatorKind::LeverageRegression => proto::Estimator::LeverageRegression,
            EstimatorKind::MaximumSampleReuse => proto::Estimator::Msr,
            EstimatorKind::TreeExact => proto::Estimator::TreeExact,
            EstimatorKind::LinearExact => proto::Estimator::LinearExact,
            EstimatorKind::RowPermutation => proto::Estimator::RowPermutation,
            EstimatorKind::TreeRowSample => proto::Estimator::TreeRowSample,
        }
    }
}

fn removal_from(request: &proto::ExplainRequest) -> Result<RemovalChoice> {
    let removal = known::<proto::Removal>("removal", request.removal)?;
    if removal != proto::Removal::Fixed && !request.fixed_values.is_empty() {
        return Err(ServiceError::invalid(
            "fixed_values",
            "is read by REMOVAL_FIXED only; leave it empty or choose REMOVAL_FIXED",
        ));
    }
    let draws_used = matches!(
        removal,
        proto::Removal::Independent | proto::Removal::ConditionalGaussian
    );
    if !draws_used && request.draws != 0 {
        return Err(ServiceError::invalid(
            "draws",
            "is read by REMOVAL_INDEPENDENT and REMOVAL_CONDITIONAL_GAUSSIAN only",
        ));
    }
    if removal != proto::Removal::ConditionalNeighbors && request.neighbor_width != 0.0 {
        return Err(ServiceError::invalid(
            "neighbor_width",
            "is read by REMOVAL_CONDITIONAL_NEIGHBORS only",
        ));
    }
    let draws = if request.draws == 0 {
        job::DEFAULT_DRAWS
    } else {
        request.draws as usize
    };
    Ok(match removal {
        proto::Removal::Marginal => RemovalChoice::Marginal,
        proto::Removal::Fixed if request.fixed_values.is_empty() => RemovalChoice::Fixed(None),
        proto::Removal::Fixed => RemovalChoice::Fixed(Some(request.fixed_values.clone())),
        proto::Removal::Independent => RemovalChoice::Independent { draws },
        proto::Removal::ConditionalGaussian => RemovalChoice::ConditionalGaussian { draws },
        proto::Removal::ConditionalNeighbors => {
            let width = if request.neighbor_width == 0.0 {
                job::DEFAULT_WIDTH
            } else {
                request.neighbor_width
            };
            if !(width.is_finite() && width > 0.0) {
                return Err(ServiceError::invalid(
                    "neighbor_width",
                    format!(
                        "must be a finite number greater than 0 (or 0 for the default); got {width}"
                    ),
                ));
            }
            RemovalChoice::ConditionalNeighbors { width }
        }
    })
}

fn target_from(request: &proto::ExplainRequest) -> Result<Target> {
    let target = known::<proto::Target>("target", request.target)?;
    if target != proto::Target::Loss && request.label.is_some() {
        return Err(ServiceError::invalid(
            "label",
            "is read by TARGET_LOSS only; leave it unset or choose TARGET_LOSS",
        ));
    }
    let dataset_given = request.dataset.is_some() || !request.dataset_labels.is_empty();
    if target != proto::Target::DatasetLoss && dataset_given {
        return Err(ServiceError::invalid(
            "dataset",
            "is read by TARGET_DATASET_LOSS only",
        ));
    }
    Ok(match target {
        proto::Target::Output => Target::Output,
        proto::Target::Probability => Target::Probability,
        proto::Target::Loss => {
            let label = request.label.ok_or_else(|| {
                ServiceError::invalid(
                    "label",
                    "is required for TARGET_LOSS: the observed outcome of this instance",
                )
            })?;
            Target::Loss { label }
        }
        proto::Target::DatasetLoss => {
            let matrix = request.dataset.as_ref().ok_or_else(|| {
                ServiceError::invalid(
                    "dataset",
                    "is required for TARGET_DATASET_LOSS: the labelled rows",
                )
            })?;
            let (rows, cols) = checked_shape("dataset", matrix)?;
            require_finite("dataset", matrix, cols)?;
            if request.dataset_labels.len() != rows {
                return Err(ServiceError::invalid(
                    "dataset_labels",
                    format!(
                        "has {} labels for {rows} dataset rows; give one per row",
                        request.dataset_labels.len()
                    ),
                ));
            }
            let rows = Array2::from_shape_vec((rows, cols), matrix.values.clone())
                .map_err(|e| ServiceError::invalid("dataset", e.to_string()))?;
            Target::DatasetLoss {
                rows,
                labels: request.dataset_labels.clone(),
            }
        }
    })
}

fn summary_from(request: &proto::ExplainRequest) -> Result<Summary> {
    let summary = known::<proto::Summary>("summary", request.summary)?;
    let kernel = known::<proto::Kernel>("kernel", request.kernel)?;
    if summary != proto::Summary::LinearFit
        && (kernel != proto::Kernel::Shapley || request.kernel_width != 0.0)
    {
        return Err(ServiceError::invalid(
            "kernel",
            "kernel and kernel_width are read by SUMMARY_LINEAR_FIT only",
        ));
    }
    if kernel == proto::Kernel::Shapley && request.kernel_width != 0.0 {
        return Err(ServiceError::invalid(
            "kernel_width",
            "is read by KERNEL_EXPONENTIAL only",
        ));
    }
    if summary != proto::Summary::Selection && request.selection_fraction != 0.0 {
        return Err(ServiceError::invalid(
            "selection_fraction",
            "is read by SUMMARY_SELECTION only",
        ));
    }
    Ok(match summary {
        proto::Summary::Shapley => Summary::Shapley,
        proto::Summary::Banzhaf => Summary::Banzhaf,
        proto::Summary::LeaveOneOut => Summary::LeaveOneOut,
        proto::Summary::IncludeOne => Summary::IncludeOne,
        proto::Summary::LinearFit => Summary::LinearFit(match kernel {
            proto::Kernel::Shapley => Kernel::Shapley,
            proto::Kernel::Exponential => {
                let width = request.kernel_width;
                if !(width.is_finite() && width > 0.0) {
                    return Err(ServiceError::invalid(
                        "kernel_width",
                        format!("KERNEL_EXPONENTIAL needs a finite width > 0; got {width}"),
                    ));
                }
                Kernel::Exponential { width }
            }
        }),
        proto::Summary::Selection => {
            let fraction = request.selection_fraction;
            if !(fraction > 0.0 && fraction <= 1.0) {
                return Err(ServiceError::invalid(
                    "selection_fraction",
                    format!("SUMMARY_SELECTION needs a fraction in (0, 1]; got {fraction}"),
                ));
            }
            Summary::Selection { fraction }
        }
    })
}

/// The engine request for `request`, with the budget already resolved by
/// the caller (request, server default and deadline).
pub fn explain_request(request: &proto::ExplainRequest, budget: Duration) -> Result<Request> {
    if request.model_id.is_empty() {
        return Err(ServiceError::invalid("model_id", "is required"));
    }
    if !(request.tolerance.is_finite() && request.tolerance >= 0.0) {
        return Err(ServiceError::invalid(
            "tolerance",
            format!(
                "must be a finite number ≥ 0 (0 = 1% of |v(all) − v(none)|); got {}",
                request.tolerance
            ),
        ));
    }
    known::<proto::Favourable>("favourable", request.favourable)?;
    known::<proto::ReasonsEffort>("reasons_effort", request.reasons_effort)?;
    space_from("decision_space", request.decision_space)?;
    let level = request.reasons_level;
    if !(level == 0.0 || (level > 0.0 && level < 1.0)) {
        return Err(ServiceError::invalid(
            "reasons_level",
            format!("must be in (0, 1), or 0 for 0.95; got {level}"),
        ));
    }
    let mut engine = Request::new(request.instance.clone());
    engine.removal = removal_from(request)?;
    engine.target = target_from(request)?;
    engine.summary = summary_from(request)?;
    engine.estimator = known::<proto::Estimator>("estimator", request.estimator)?.into();
    engine.budget = budget;
    engine.max_evaluations = if request.max_evaluations == 0 {
        DEFAULT_MAX_EVALUATIONS
    } else {
        request.max_evaluations
    };
    engine.tolerance = request.tolerance;
    engine.seed = request.seed;
    Ok(engine)
}

/// One item of a batch or a stream: the answer, or the error its unary
/// call would have returned.
pub fn outcome(
    request_id: String,
    index: u64,
    result: std::result::Result<proto::Explanation, ServiceError>,
) -> proto::ExplainOutcome {
    use proto::explain_outcome::Outcome;
    proto::ExplainOutcome {
        request_id,
        index,
        outcome: Some(match result {
            Ok(explanation) => Outcome::Explanation(explanation),
            Err(error) => Outcome::Error(super::status::item_error(&error)),
        }),
    }
}

/// The answer on the wire: one attribution per player in player order, the
/// principal reasons, and the accounting.
pub fn explanation(
    entry: &Entry,
    request: &proto::ExplainRequest,
    answer: &job::Explanation,
    budget: Duration,
) -> proto::Explanation {
    let echo = Echo {
        request_id: &request.request_id,
        seed: request.seed,
        request,
    };
    explanation_echoing(entry, &echo, answer, budget)
}

/// What an answer repeats from its request, which in a batch differs per
/// instance.
#[derive(Debug, Clone, Copy)]
pub struct Echo<'a> {
    pub request_id: &'a str,
    pub seed: u64,
    /// The request whose reason options (direction, space, number, level)
    /// and target apply.
    pub request: &'a proto::ExplainRequest,
}

/// [`explanation`], with the echoed fields given one by one.
pub fn explanation_echoing(
    entry: &Entry,
    echo: &Echo<'_>,
    answer: &job::Explanation,
    budget: Duration,
) -> proto::Explanation {
    let estimate = &answer.estimate;
    let names = entry.players().names();
    let attributions = names
        .iter()
        .zip(&estimate.values)
        .zip(&estimate.std_errors)
        .map(|((name, value), std_error)| proto::FeatureAttribution {
            name: name.clone(),
            value: *value,
            std_error: *std_error,
        })
        .collect();
    let listed = listed_reasons(entry, echo.request, echo.seed, estimate);
    let reasons = listed
        .reasons
        .reasons
        .iter()
        .map(|reason| proto::Reason {
            name: names.get(reason.players[0]).cloned().unwrap_or_default(),
            reason_code: reason.code.clone(),
            statement: reason.statement.clone(),
            weight: reason.weight,
            confident: reason.confident,
            in_list_probability: reason.in_list_probability,
            players: reason
                .players
                .iter()
                .filter_map(|&p| names.get(p).cloned())
                .collect(),
        })
        .collect();
    let (selected, selection_value) = match &estimate.selection {
        Some(selection) => (
            selection
                .players
                .iter()
                .filter_map(|&player| names.get(player).cloned())
                .collect(),
            selection.value,
        ),
        None => (Vec::new(), 0.0),
    };
    let info = entry.info();
    proto::Explanation {
        model_id: info.model_id.clone(),
        version: info.version,
        request_id: echo.request_id.to_string(),
        value_full: estimate.value_full,
        value_empty: estimate.value_empty,
        attributions,
        estimator_used: proto::Estimator::from(answer.estimator) as i32,
        coalitions_evaluated: answer.coalitions_evaluated,
        model_rows_evaluated: answer.model_rows_evaluated,
        converged: estimate.converged,
        elapsed_us: u64::try_from(answer.elapsed.as_micros()).unwrap_or(u64::MAX),
        seed: echo.seed,
        plan_reason: answer.plan_reason.clone(),
        cache_hits: answer.cache_hits,
        efficiency_gap: estimate.efficiency_gap(),
        relative_error: estimate.relative_error(),
        reasons,
        selected,
        selection_value,
        budget_ms: u32::try_from(budget.as_millis()).unwrap_or(u32::MAX),
        reasons_set_probability: listed.reasons.set_probability,
        reasons_certain: listed.reasons.certain,
        outcome: match listed.outcome {
            Outcome::Unknown => proto::Outcome::Unknown,
            Outcome::Favourable => proto::Outcome::Favourable,
            Outcome::Adverse => proto::Outcome::Adverse,
        } as i32,
        reasons_note: listed.note,
        boundary_evaluations: answer.boundary.as_ref().map_or(0, |b| b.evaluations),
        boundary_players: answer.boundary.as_ref().map_or_else(Vec::new, |b| {
            b.players
                .iter()
                .filter_map(|&p| names.get(p).cloned())
                .collect()
        }),
    }
}

/// The reasons of an answer, the outcome, and why there are none.
struct Listed {
    reasons: reasons::Reasons,
    outcome: Outcome,
    note: String,
}

/// How an answer's reasons are listed: which sign of a contribution is
/// adverse, in which space, how many, and the level the set must reach.
struct Terms {
    sign: f64,
    /// The target's space; `None` for LOSS.
    space: Option<Space>,
    decision: Decision,
    limit: usize,
    level: f64,
}

/// The terms of the reasons in the decision's direction and space: for
/// OUTPUT and PROBABILITY targets in the decision's space, the players that
/// pushed the value toward the unfavourable side; for LOSS those that
/// raised the loss. Why none are listed otherwise: DATASET_LOSS (global
/// importance decides nothing), or a target in another space than the
/// decision's (the order of reasons can differ between margin and
/// probability).
fn reason_terms(
    entry: &Entry,
    request: &proto::ExplainRequest,
) -> std::result::Result<Terms, String> {
    let mut decision = entry.info().decision.unwrap_or_default();
    // Validated with the request (see `explain_request`).
    match proto::Favourable::try_from(request.favourable) {
        Ok(proto::Favourable::Higher) => decision.favourable = Favourable::Higher,
        Ok(proto::Favourable::Lower) => decision.favourable = Favourable::Lower,
        _ => {}
    }
    if let Ok(Some(space)) = space_from("decision_space", request.decision_space) {
        decision.space = Some(space);
    }
    let target = proto::Target::try_from(request.target).unwrap_or(proto::Target::Output);
    let (sign, space) = match target {
        proto::Target::DatasetLoss => {
            return Err(
                "TARGET_DATASET_LOSS measures global importance; it lists no reasons".into(),
            );
        }
        proto::Target::Loss => (1.0, None),
        proto::Target::Output | proto::Target::Probability => {
            let space = if target == proto::Target::Output {
                Space::Output
            } else {
                Space::Probability
            };
            if decision.space.is_some_and(|s| s != space) {
                return Err(format!(
                    "the decision is taken on the {}; ask for {} to list reasons",
                    if space == Space::Output {
                        "probability"
                    } else {
                        "output"
                    },
                    if space == Space::Output {
                        "TARGET_PROBABILITY"
                    } else {
                        "TARGET_OUTPUT"
                    },
                ));
            }
            let sign = match decision.favourable {
                Favourable::Higher => -1.0,
                Favourable::Lower => 1.0,
            };
            (sign, Some(space))
        }
    };
    let limit = if request.max_reasons == 0 {
        reasons::DEFAULT_REASONS
    } else {
        request.max_reasons as usize
    };
    let level = if request.reasons_level == 0.0 {
        reasons::DEFAULT_LEVEL
    } else {
        request.reasons_level
    };
    Ok(Terms {
        sign,
        space,
        decision,
        limit,
        level,
    })
}

/// What a request's sampled answer is aimed at separating: its listed
/// reasons, unless the request asks for even effort or lists none (no
/// player has a statement, or its target is not in the decision's space).
pub fn reasons_goal(entry: &Entry, request: &proto::ExplainRequest) -> Option<Arc<Goal>> {
    if request.reasons_effort == proto::ReasonsEffort::Even as i32 {
        return None;
    }
    if entry.reason_statements().iter().all(String::is_empty) {
        return None;
    }
    let terms = reason_terms(entry, request).ok()?;
    Some(Arc::new(Goal {
        sign: terms.sign,
        limit: terms.limit,
        level: terms.level,
        codes: entry.reason_codes().to_vec(),
        statements: entry.reason_statements().to_vec(),
    }))
}

/// The reasons of an answer (see [`reason_terms`]), the outcome, and why
/// there are none.
fn listed_reasons(
    entry: &Entry,
    request: &proto::ExplainRequest,
    seed: u64,
    estimate: &crate::engine::Estimate,
) -> Listed {
    let terms = match reason_terms(entry, request) {
        Ok(terms) => terms,
        Err(note) => {
            return Listed {
                reasons: reasons::Reasons {
                    reasons: Vec::new(),
                    set_probability: 1.0,
                    certain: true,
                },
                outcome: Outcome::Unknown,
                note,
            };
        }
    };
    let listed = reasons::principal_reasons(
        &reasons::Attributions {
            values: &estimate.values,
            std_errors: &estimate.std_errors,
            codes: entry.reason_codes(),
            statements: entry.reason_statements(),
        },
        terms.sign,
        terms.limit,
        terms.level,
        seed,
    );
    let outcome = match (terms.space, terms.decision.space) {
        (Some(space), Some(decided)) if space == decided => {
            terms.decision.outcome(estimate.value_full)
        }
        _ => Outcome::Unknown,
    };
    let note = if listed.reasons.is_empty() {
        "no player with a reason statement pushed the value toward the unfavourable side".into()
    } else {
        String::new()
    };
    Listed {
        reasons: listed,
        outcome,
        note,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // These checks follow the API's own documented rules (the proto
    // comments): common practice, no source.

    fn request() -> proto::ExplainRequest {
        proto::ExplainRequest {
            model_id: "m".into(),
            instance: vec![1.0, 2.0],
            ..Default::default()
        }
    }

    fn field_of(error: ServiceError) -> String {
        match error {
            ServiceError::Invalid(engine) => engine.field,
            other => panic!("expected INVALID_ARGUMENT, got {other:?}"),
        }
    }

    #[test]
    fn options_given_to_the_wrong_choice_name_their_field() {
        let mut wrong = request();
        wrong.fixed_values = vec![0.0, 0.0];
        assert_eq!(
            field_of(explain_request(&wrong, Duration::ZERO).unwrap_err()),
            "fixed_values"
        );
        let mut wrong = request();
        wrong.label = Some(1.0);
        assert_eq!(
            field_of(explain_request(&wrong, Duration::ZERO).unwrap_err()),
            "label"
        );
        let mut wrong = request();
        wrong.target = proto::Target::Loss as i32;
        assert_eq!(
            field_of(explain_request(&wrong, Duration::ZERO).unwrap_err()),
            "label"
        );
        let mut wrong = request();
        wrong.summary = proto::Summary::Selection as i32;
        assert_eq!(
            field_of(explain_request(&wrong, Duration::ZERO).unwrap_err()),
            "selection_fraction"
        );
        let mut wrong = request();
        wrong.removal = 99;
        assert_eq!(
            field_of(explain_request(&wrong, Duration::ZERO).unwrap_err()),
            "removal"
        );
    }

    #[test]
    fn defaults_fill_the_zero_values() {
        let mut gaussian = request();
        gaussian.removal = proto::Removal::ConditionalGaussian as i32;
        let engine = explain_request(&gaussian, Duration::from_millis(7)).unwrap();
        assert_eq!(
            engine.removal,
            RemovalChoice::ConditionalGaussian {
                draws: job::DEFAULT_DRAWS
            }
        );
        assert_eq!(engine.max_evaluations, DEFAULT_MAX_EVALUATIONS);
        assert_eq!(engine.budget, Duration::from_millis(7));
        assert_eq!(engine.estimator, None);
    }

    #[test]
    fn a_matrix_whose_shape_disagrees_with_its_values_is_refused() {
        let matrix = proto::Matrix {
            rows: 2,
            cols: 2,
            values: vec![1.0, 2.0, 3.0],
        };
        assert_eq!(
            field_of(checked_shape("background", &matrix).unwrap_err()),
            "background"
        );
    }
}
