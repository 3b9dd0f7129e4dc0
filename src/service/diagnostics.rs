//! The Diagnostics service: `Echo`, the stack's baseline for throughput
//! figures.

use tonic::{Request, Response, Status};

use super::proto;
use super::proto::diagnostics_server::Diagnostics;
use super::server::observe;

#[derive(Debug, Clone, Default)]
pub(super) struct DiagnosticsService;

#[tonic::async_trait]
impl Diagnostics for DiagnosticsService {
    async fn echo(
        &self,
        request: Request<proto::EchoRequest>,
    ) -> Result<Response<proto::EchoResponse>, Status> {
        let result = Ok(Response::new(proto::EchoResponse {
            payload: request.into_inner().payload,
        }));
        observe("Echo", &result);
        result
    }
}
