//! The thin gRPC client behind `apportion models` and `apportion explain`:
//! reads instances from CSV or JSON lines and writes one JSON object per
//! answer, for scripts and operators.

use std::path::Path;

use serde_json::{Value, json};
use tonic::transport::Channel;

use crate::service::proto::{
    self, attributions_client::AttributionsClient, registry_client::RegistryClient,
};

pub type Failure = Box<dyn std::error::Error + Send + Sync>;

async fn connect(address: &str) -> Result<Channel, Failure> {
    let endpoint = if address.contains("://") {
        address.to_string()
    } else {
        format!("http://{address}")
    };
    Ok(Channel::from_shared(endpoint)?.connect().await?)
}

/// Every registered model version, one JSON object each.
pub async fn models(address: &str) -> Result<Vec<Value>, Failure> {
    let mut registry = RegistryClient::new(connect(address).await?);
    let listed = registry
        .list_models(proto::ListModelsRequest {})
        .await?
        .into_inner();
    Ok(listed
        .models
        .iter()
        .map(|m| {
            json!({
                "model_id": m.model_id,
                "version": m.version,
                "model_kind": m.model_kind,
                "features": m.features.iter().map(|f| &f.name).collect::<Vec<_>>(),
                "background_rows": m.background_rows,
                "row_cost_ns": m.row_cost_ns,
                "checksum": m.checksum,
            })
        })
        .collect())
}

/// Explains each instance with the choices in `template` (its `instance`
/// is replaced), in order.
pub async fn explain(
    address: &str,
    template: proto::ExplainRequest,
    instances: Vec<Vec<f64>>,
) -> Result<Vec<Value>, Failure> {
    let mut attributions = AttributionsClient::new(connect(address).await?);
    let mut answers = Vec::with_capacity(instances.len());
    for (line, instance) in instances.into_iter().enumerate() {
        let request = proto::ExplainRequest {
            instance,
            request_id: format!("{}-{}", template.request_id, line + 1),
            ..template.clone()
        };
        let e = attributions.explain(request).await?.into_inner();
        let estimator =
            proto::Estimator::try_from(e.estimator_used).map_or("UNKNOWN", |k| k.as_str_name());
        answers.push(json!({
            "request_id": e.request_id,
            "model_id": e.model_id,
            "version": e.version,
            "value_full": e.value_full,
            "value_empty": e.value_empty,
            "attributions": e.attributions.iter().map(|a| json!({
                "name": a.name, "value": a.value, "std_error": a.std_error,
            })).collect::<Vec<_>>(),
            "estimator": estimator,
            "plan_reason": e.plan_reason,
            "converged": e.converged,
            "coalitions_evaluated": e.coalitions_evaluated,
            "elapsed_us": e.elapsed_us,
            "reasons": e.reasons.iter().map(|r| json!({
                "name": r.name, "code": r.reason_code, "statement": r.statement, "weight": r.weight,
            })).collect::<Vec<_>>(),
        }));
    }
    Ok(answers)
}

/// Instances from `path`: JSON lines (`.jsonl`/`.json`: one array of
/// numbers per line, `null` for missing) or CSV (anything else: a header
/// line is skipped when it is not numeric; empty, `NA` and `NaN` cells are
/// missing).
pub fn read_instances(path: &Path) -> Result<Vec<Vec<f64>>, Failure> {
    let text = std::fs::read_to_string(path)
        .map_err(|e| format!("{}: cannot read: {e}", path.display()))?;
    let json_lines = matches!(
        path.extension().and_then(|e| e.to_str()),
        Some("jsonl" | "json")
    );
    let mut rows = Vec::new();
    for (number, line) in text.lines().enumerate() {
        if line.trim().is_empty() {
            continue;
        }
        let at = |why: String| format!("{}:{}: {why}", path.display(), number + 1);
        let row = if json_lines {
            let values: Vec<Option<f64>> = serde_json::from_str(line)
                .map_err(|e| at(format!("expected an array of numbers or null: {e}")))?;
            values.into_iter().map(|v| v.unwrap_or(f64::NAN)).collect()
        } else {
            let cells: Result<Vec<f64>, String> = line
                .split(',')
                .map(|cell| match cell.trim() {
                    "" | "NA" | "NaN" | "nan" => Ok(f64::NAN),
                    number => number
                        .parse()
                        .map_err(|_| format!("{number:?} is not a number")),
                })
                .collect();
            match cells {
                Ok(values) => values,
                Err(_) if rows.is_empty() && number == 0 => continue, // a header
                Err(why) => return Err(at(why).into()),
            }
        };
        rows.push(row);
    }
    if rows.is_empty() {
        return Err(format!("{}: no instances found", path.display()).into());
    }
    Ok(rows)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn csv_and_json_lines_read_alike_with_missing_values() {
        // Formats as described above (common practice, no source).
        let dir = std::env::temp_dir().join(format!("apportion-client-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let csv = dir.join("rows.csv");
        std::fs::write(&csv, "income,rent\n3000,0.3\n2500,\n").unwrap();
        let jsonl = dir.join("rows.jsonl");
        std::fs::write(&jsonl, "[3000, 0.3]\n[2500, null]\n").unwrap();
        for path in [&csv, &jsonl] {
            let rows = read_instances(path).unwrap();
            assert_eq!(rows.len(), 2);
            assert_eq!(rows[0], vec![3000.0, 0.3]);
            assert!(rows[1][1].is_nan());
        }
        std::fs::write(&csv, "1,2\n3,x\n").unwrap();
        let err = read_instances(&csv).unwrap_err().to_string();
        assert!(err.contains(":2:"), "{err}");
        std::fs::remove_dir_all(&dir).unwrap();
    }
}
