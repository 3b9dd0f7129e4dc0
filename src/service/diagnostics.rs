//! The Diagnostics service: `Echo`, the stack's baseline for throughput
//! figures.

use std::sync::Arc;

use tonic::{Request, Response, Status};

use super::auth::Access;
use super::proto;
use super::proto::diagnostics_server::Diagnostics;
use super::server::{Shared, observe};

#[derive(Debug, Clone)]
pub(super) struct DiagnosticsService {
    /// For the tokens: Echo needs a token, like any call of the API.
    pub(super) shared: Arc<Shared>,
}

#[tonic::async_trait]
impl Diagnostics for DiagnosticsService {
    async fn echo(
        &self,
        request: Request<proto::EchoRequest>,
    ) -> Result<Response<proto::EchoResponse>, Status> {
        let result = self
            .shared
            .admit(request.metadata(), Access::Read)
            .map(|_flight| {
                Response::new(proto::EchoResponse {
                    payload: request.into_inner().payload,
                })
            });
        observe("Echo", &result);
        result
    }
}
