//! ONNX models, evaluated on the CPU by the pure-Rust `tract` runtime. The
//! graph must take one input of shape `[batch, features]` (float or double)
//! and give, at the chosen output, `[batch]` or `[batch, k]`, of which one
//! column is the model's raw output.

use ndarray::ArrayView2;
use tract_onnx::prelude::*;
use tract_onnx::tract_hir::infer::Factoid;

use crate::engine::error::{EngineError, Result};
use crate::engine::model::{Link, Model};

type Plan = TypedSimplePlan<TypedModel>;

pub struct OnnxModel {
    plan: Plan,
    input_type: DatumType,
    inputs: usize,
    column: usize,
    link: Link,
}

impl std::fmt::Debug for OnnxModel {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("OnnxModel")
            .field("input_type", &self.input_type)
            .field("inputs", &self.inputs)
            .field("column", &self.column)
            .field("link", &self.link)
            .finish_non_exhaustive()
    }
}

fn refused(field: &str, what: impl std::fmt::Display) -> EngineError {
    EngineError::new(field, what.to_string())
}

impl OnnxModel {
    /// Loads `bytes` (an ONNX `ModelProto`) for `inputs` features. `output`
    /// names the graph output to read (empty: the first); `column` is the
    /// column of a `[batch, k]` output that holds the model's raw output.
    pub fn try_new(
        bytes: &[u8],
        inputs: usize,
        output: &str,
        column: usize,
        link: Link,
    ) -> Result<OnnxModel> {
        let mut model = tract_onnx::onnx()
            .model_for_read(&mut &bytes[..])
            .map_err(|e| refused("onnx", format!("is not a loadable ONNX model: {e:#}")))?;
        if model.inputs.len() != 1 {
            return Err(refused(
                "onnx",
                format!(
                    "the graph has {} inputs; one input of shape [batch, features] is needed",
                    model.inputs.len()
                ),
            ));
        }
        let declared = model
            .input_fact(0)
            .map_err(|e| refused("onnx", e))?
            .datum_type
            .concretize();
        let input_type = match declared {
            Some(DatumType::F64) => DatumType::F64,
            Some(DatumType::F32) | None => DatumType::F32,
            Some(other) => {
                return Err(refused(
                    "onnx",
                    format!("the input is of type {other:?}; float or double is needed"),
                ));
            }
        };
        let batch = model.sym("batch");
        model
            .set_input_fact(
                0,
                InferenceFact::dt_shape(input_type, tvec![batch.to_dim(), inputs.to_dim()]),
            )
            .map_err(|e| refused("onnx", e))?;
        if !output.is_empty() {
            model = model.with_output_names([output]).map_err(|e| {
                refused(
                    "onnx_output",
                    format!("{output:?} is not an output of the graph: {e}"),
                )
            })?;
        } else if model.outputs.len() > 1 {
            model.outputs.truncate(1);
        }
        let plan = model
            .into_optimized()
            .and_then(|typed| typed.into_runnable())
            .map_err(|e| {
                refused(
                    "onnx",
                    format!("cannot be prepared for [batch, {inputs}] inputs: {e:#}"),
                )
            })?;
        let onnx = OnnxModel {
            plan,
            input_type,
            inputs,
            column,
            link,
        };
        // One trial batch checks the output's shape and the column now,
        // rather than on the first explanation.
        let trial = ndarray::Array2::<f64>::zeros((2, inputs));
        onnx.try_predict(trial.view())?;
        Ok(onnx)
    }

    /// Raw outputs of `rows`, or why the runtime could not give them.
    pub fn try_predict(&self, rows: ArrayView2<'_, f64>) -> Result<Vec<f64>> {
        let n = rows.nrows();
        let shape = [n, self.inputs];
        let tensor = match self.input_type {
            DatumType::F64 => Tensor::from_shape(&shape, &rows.iter().copied().collect::<Vec<_>>()),
            _ => Tensor::from_shape(
                &shape,
                &rows.iter().map(|&v| v as f32).collect::<Vec<f32>>(),
            ),
        }
        .map_err(|e| refused("onnx", e))?;
        let outputs = self
            .plan
            .run(tvec![tensor.into()])
            .map_err(|e| refused("onnx", format!("evaluation failed: {e:#}")))?;
        let output = outputs[0]
            .cast_to::<f64>()
            .map_err(|e| refused("onnx", format!("the output is not numeric: {e}")))?;
        let dims = output.shape().to_vec();
        let width = match dims.as_slice() {
            [rows] if *rows == n => 1,
            [rows, k] if *rows == n => *k,
            _ => {
                return Err(refused(
                    "onnx",
                    format!("the output has shape {dims:?}; [batch] or [batch, k] is needed"),
                ));
            }
        };
        if self.column >= width {
            return Err(refused(
                "onnx_output_column",
                format!("is {} but the output has {width} column(s)", self.column),
            ));
        }
        let values = output.as_slice::<f64>().map_err(|e| refused("onnx", e))?;
        Ok(values
            .chunks_exact(width)
            .map(|row| row[self.column])
            .collect())
    }
}

impl Model for OnnxModel {
    fn inputs(&self) -> usize {
        self.inputs
    }

    fn link(&self) -> Link {
        self.link
    }

    /// A failed evaluation gives NaN, which the engine refuses to explain;
    /// registration has already run the model on its background.
    fn predict(&self, rows: ArrayView2<'_, f64>, out: &mut [f64]) {
        match self.try_predict(rows) {
            Ok(values) => out[..values.len()].copy_from_slice(&values),
            Err(error) => {
                tracing::error!(%error, "ONNX evaluation failed");
                out[..rows.nrows()].fill(f64::NAN);
            }
        }
    }

    fn kind(&self) -> &'static str {
        "onnx-graph"
    }
}
