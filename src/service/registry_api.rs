//! The Registry service: register, read, list and delete models. Writes
//! measure, prepare and fsync, so they run on blocking threads (outside the
//! explain pool's permits: a slow registration is never refused for it).

use std::sync::Arc;

use tonic::{Request, Response, Status};

use super::auth::Access;
use super::pool::guarded;
use super::proto;
use super::proto::registry_server::Registry as RegistryApi;
use super::server::{Shared, observe};
use super::status::ServiceError;
use crate::registry::{ModelSpec, Registry};
use crate::telemetry;

pub(super) fn set_registered_models(registry: &Registry) {
    metrics::gauge!(telemetry::REGISTERED_MODELS).set(registry.list().len() as f64);
}

#[derive(Debug, Clone)]
pub(super) struct RegistryService {
    pub(super) shared: Arc<Shared>,
}

impl RegistryService {
    async fn register(
        &self,
        request: proto::RegisterModelRequest,
    ) -> Result<proto::ModelInfo, ServiceError> {
        let spec = ModelSpec::try_from(request)?;
        let registry = self.shared.registry.clone();
        // Registration measures the model and fsyncs files: blocking work,
        // kept off the reactor (but outside the explain pool's permits, so
        // it is never refused for being slow).
        let info = tokio::task::spawn_blocking(move || {
            guarded("registration", || {
                let info = registry.register(spec);
                set_registered_models(&registry);
                info
            })
        })
        .await
        .map_err(|e| ServiceError::Internal(format!("registration failed: {e}")))???;
        Ok(proto::ModelInfo::from(&info))
    }

    async fn delete(
        &self,
        request: proto::DeleteModelRequest,
    ) -> Result<proto::DeleteModelResponse, ServiceError> {
        if request.model_id.is_empty() {
            return Err(ServiceError::invalid("model_id", "is required"));
        }
        let registry = self.shared.registry.clone();
        let shared = self.shared.clone();
        let deleted = tokio::task::spawn_blocking(move || {
            let deleted = registry.delete(&request.model_id, request.version);
            if deleted.is_ok() {
                shared.drift.forget(&request.model_id, request.version);
            }
            set_registered_models(&registry);
            deleted
        })
        .await
        .map_err(|e| ServiceError::Internal(format!("deletion failed: {e}")))??;
        Ok(proto::DeleteModelResponse {
            deleted: u32::try_from(deleted).unwrap_or(u32::MAX),
        })
    }
}

#[tonic::async_trait]
impl RegistryApi for RegistryService {
    async fn register_model(
        &self,
        request: Request<proto::RegisterModelRequest>,
    ) -> Result<Response<proto::ModelInfo>, Status> {
        let result = match self.shared.admit(request.metadata(), Access::Write) {
            Ok(_flight) => self
                .register(request.into_inner())
                .await
                .map(Response::new)
                .map_err(Status::from),
            Err(refused) => Err(refused),
        };
        observe("RegisterModel", &result);
        result
    }

    async fn get_model(
        &self,
        request: Request<proto::GetModelRequest>,
    ) -> Result<Response<proto::ModelInfo>, Status> {
        let result = self
            .shared
            .admit(request.metadata(), Access::Read)
            .and_then(|_flight| {
                let request = request.into_inner();
                self.shared
                    .registry
                    .get(&request.model_id, request.version)
                    .map(|entry| Response::new(proto::ModelInfo::from(entry.info())))
                    .map_err(|e| Status::from(ServiceError::from(e)))
            });
        observe("GetModel", &result);
        result
    }

    async fn list_models(
        &self,
        request: Request<proto::ListModelsRequest>,
    ) -> Result<Response<proto::ListModelsResponse>, Status> {
        let result = self
            .shared
            .admit(request.metadata(), Access::Read)
            .map(|_flight| {
                let models = self
                    .shared
                    .registry
                    .list()
                    .iter()
                    .map(proto::ModelInfo::from)
                    .collect();
                Response::new(proto::ListModelsResponse { models })
            });
        observe("ListModels", &result);
        result
    }

    async fn delete_model(
        &self,
        request: Request<proto::DeleteModelRequest>,
    ) -> Result<Response<proto::DeleteModelResponse>, Status> {
        let result = match self.shared.admit(request.metadata(), Access::Write) {
            Ok(_flight) => self
                .delete(request.into_inner())
                .await
                .map(Response::new)
                .map_err(Status::from),
            Err(refused) => Err(refused),
        };
        observe("DeleteModel", &result);
        result
    }
}
