//! `FitRegistry`: fit status (one, a filtered page, counts, a watch stream), results, curves, exports,
//! reports, uploads and the stored file, and the decisions on a fit (cancel, retry, refit, approve,
//! reject), each with the role of its HTTP twin and through the same operation of [`crate::ops`].

use super::proto::fit_registry_server::FitRegistry;
use super::proto::{self, CountFitsRequest, ExportFitRequest, FitRef, ListFitsRequest};
use super::{caller, convert, fit_id, status};
use crate::app::AppState;
use crate::ops::exports::TextExport;
use crate::ops::fits::FitListQuery;
use crate::ops::sweeps::UploadInput;
use crate::ops::{self, OpsError};
use crate::registry::wire::FitStatus;
use crate::store::sweeps::NamedFile;
use crate::store::tokens::Role;
use std::time::Duration;
use tokio::sync::{mpsc, watch};
use tokio_stream::wrappers::ReceiverStream;
use tonic::{Request, Response, Status};

/// How often a watch looks at the fit's status (a dashboard needs no finer steps).
const WATCH_POLL: Duration = Duration::from_millis(100);

pub struct Fits {
    pub state: AppState,
    /// Turns true when the service shuts down: open watch streams end then.
    pub stop: watch::Receiver<bool>,
}

fn terminal(s: FitStatus) -> bool {
    matches!(
        s,
        FitStatus::Succeeded | FitStatus::Failed | FitStatus::Cancelled
    )
}

#[tonic::async_trait]
impl FitRegistry for Fits {
    async fn get_fit_status(
        &self,
        request: Request<FitRef>,
    ) -> Result<Response<proto::FitSummary>, Status> {
        caller(&self.state, &request, Role::Reader).await?;
        let id = fit_id(request.into_inner().fit_id)?;
        let s = ops::fits::summary(&self.state, id).await.map_err(status)?;
        Ok(Response::new(convert::fit_summary(s)))
    }

    async fn list_fits(
        &self,
        request: Request<ListFitsRequest>,
    ) -> Result<Response<proto::FitPage>, Status> {
        caller(&self.state, &request, Role::Reader).await?;
        let r = request.into_inner();
        let state = proto::FitState::try_from(r.state).map_err(|_| {
            Status::invalid_argument(format!("state {} is not a FitState", r.state))
        })?;
        let query = FitListQuery {
            status: convert::fit_status(state).map(|s| s.as_str().to_string()),
            error_kind: r.error_kind,
            part_number: r.part_number,
            lot: r.lot,
            since: r.since,
            limit: r.limit,
            cursor: r.cursor,
        };
        let page = ops::fits::list(&self.state, query).await.map_err(status)?;
        Ok(Response::new(convert::fit_page(page)))
    }

    async fn count_fits(
        &self,
        request: Request<CountFitsRequest>,
    ) -> Result<Response<proto::FitCounts>, Status> {
        caller(&self.state, &request, Role::Reader).await?;
        let c = ops::fits::counts(&self.state).await.map_err(status)?;
        Ok(Response::new(convert::fit_counts(c)))
    }

    type WatchFitStream = ReceiverStream<Result<proto::FitSummary, Status>>;

    async fn watch_fit(
        &self,
        request: Request<FitRef>,
    ) -> Result<Response<Self::WatchFitStream>, Status> {
        caller(&self.state, &request, Role::Reader).await?;
        let id = fit_id(request.into_inner().fit_id)?;
        // An unknown fit is NOT_FOUND before any stream starts.
        let first = ops::fits::summary(&self.state, id).await.map_err(status)?;
        let (tx, rx) = mpsc::channel(4);
        let state = self.state.clone();
        let mut stop = self.stop.clone();
        tokio::spawn(async move {
            let mut last = first;
            if tx
                .send(Ok(convert::fit_summary(last.clone())))
                .await
                .is_err()
                || terminal(last.status)
            {
                return;
            }
            loop {
                tokio::select! {
                    _ = async { stop.wait_for(|s| *s).await.map(|_| ()) } => {
                        let _ = tx
                            .send(Err(Status::unavailable("the service is shutting down")))
                            .await;
                        return;
                    }
                    _ = tx.closed() => return,
                    _ = tokio::time::sleep(WATCH_POLL) => {}
                }
                match ops::fits::summary(&state, id).await {
                    Ok(now) if now == last => {}
                    Ok(now) => {
                        let done = terminal(now.status);
                        if tx
                            .send(Ok(convert::fit_summary(now.clone())))
                            .await
                            .is_err()
                            || done
                        {
                            return;
                        }
                        last = now;
                    }
                    Err(e) => {
                        let _ = tx.send(Err(status(e))).await;
                        return;
                    }
                }
            }
        });
        Ok(Response::new(ReceiverStream::new(rx)))
    }

    async fn get_fit_result(
        &self,
        request: Request<FitRef>,
    ) -> Result<Response<proto::FitResult>, Status> {
        caller(&self.state, &request, Role::Reader).await?;
        let id = fit_id(request.into_inner().fit_id)?;
        let detail = ops::fits::detail(&self.state, id).await.map_err(status)?;
        Ok(Response::new(fit_result(detail)?))
    }

    async fn export_fit(
        &self,
        request: Request<ExportFitRequest>,
    ) -> Result<Response<proto::ExportedText>, Status> {
        caller(&self.state, &request, Role::Reader).await?;
        let r = request.into_inner();
        let id = fit_id(r.fit_id)?;
        let export = match proto::ExportFormat::try_from(r.format) {
            Ok(proto::ExportFormat::SpiceSubcircuit) => TextExport::Subcircuit,
            Ok(proto::ExportFormat::Touchstone1port) => TextExport::Touchstone,
            Ok(proto::ExportFormat::ModelJson) => {
                let (file_name, body) = ops::exports::model_json(&self.state, id)
                    .await
                    .map_err(status)?;
                let text = serde_json::to_string(&body).map_err(|e| {
                    status(OpsError::internal(format!("fit {id}: model JSON: {e}")))
                })?;
                return Ok(Response::new(proto::ExportedText { file_name, text }));
            }
            _ => {
                return Err(Status::invalid_argument(
                    "format must be EXPORT_FORMAT_SPICE_SUBCIRCUIT, EXPORT_FORMAT_TOUCHSTONE_1PORT \
                     or EXPORT_FORMAT_MODEL_JSON",
                ));
            }
        };
        let (file_name, text) = ops::exports::export_text(&self.state, id, export)
            .await
            .map_err(status)?;
        Ok(Response::new(proto::ExportedText { file_name, text }))
    }

    async fn upload_sweep(
        &self,
        request: Request<proto::UploadSweepRequest>,
    ) -> Result<Response<proto::UploadAccepted>, Status> {
        let who = caller(&self.state, &request, Role::Inspector).await?;
        let r = request.into_inner();
        // The message is in memory already; its bytes still count against those in flight.
        let size = r.file.len()
            + r.fixture_open.as_ref().map_or(0, |f| f.content.len())
            + r.fixture_short.as_ref().map_or(0, |f| f.content.len());
        let _bytes = self
            .state
            .backpressure
            .reserve_upload_bytes(size as u64)
            .map_err(status)?;
        let named = |f: proto::NamedFile| NamedFile {
            name: f.file_name,
            bytes: f.content,
        };
        let input = UploadInput {
            file: Some(NamedFile {
                name: r.file_name,
                bytes: r.file,
            }),
            fixture_open: r.fixture_open.map(named),
            fixture_short: r.fixture_short.map(named),
            fixture_topology: r.fixture_topology.unwrap_or_default(),
            part_number: r.part_number,
            lot: r.lot,
            method: r.method.unwrap_or_default(),
            z0_ohm: r.z0_ohm,
            dcr_ohm: r.dcr_ohm,
            temperature_c: r.temperature_c,
            operator: r.operator.unwrap_or_default(),
            options: r.options_json.unwrap_or_default(),
        };
        let accepted = ops::sweeps::upload(&self.state, &who.label, input)
            .await
            .map_err(status)?;
        Ok(Response::new(proto::UploadAccepted {
            fit_id: accepted.fit_id,
            sweep_id: accepted.sweep_id,
            duplicate: accepted.duplicate,
        }))
    }

    async fn cancel_fit(
        &self,
        request: Request<FitRef>,
    ) -> Result<Response<proto::FitSummary>, Status> {
        let who = caller(&self.state, &request, Role::Inspector).await?;
        let id = fit_id(request.into_inner().fit_id)?;
        let s = ops::fits::cancel(&self.state, &who.label, id)
            .await
            .map_err(status)?;
        Ok(Response::new(convert::fit_summary(s)))
    }

    async fn retry_fit(
        &self,
        request: Request<FitRef>,
    ) -> Result<Response<proto::FitSummary>, Status> {
        let who = caller(&self.state, &request, Role::Inspector).await?;
        let id = fit_id(request.into_inner().fit_id)?;
        let s = ops::fits::retry(&self.state, &who.label, id)
            .await
            .map_err(status)?;
        Ok(Response::new(convert::fit_summary(s)))
    }

    async fn refit_fit(
        &self,
        request: Request<proto::RefitFitRequest>,
    ) -> Result<Response<proto::RefitAccepted>, Status> {
        let who = caller(&self.state, &request, Role::Engineer).await?;
        let r = request.into_inner();
        let id = fit_id(r.fit_id)?;
        let options = match r.options_json.as_deref().map(str::trim) {
            None | Some("") => serde_json::Value::Null,
            Some(text) => serde_json::from_str(text)
                .map_err(|e| status(OpsError::validation(format!("options is not JSON: {e}"))))?,
        };
        let new_id = ops::fits::refit(&self.state, &who.label, id, options)
            .await
            .map_err(status)?;
        Ok(Response::new(proto::RefitAccepted { fit_id: new_id }))
    }

    async fn approve_fit(
        &self,
        request: Request<proto::ApproveFitRequest>,
    ) -> Result<Response<proto::FitResult>, Status> {
        let who = caller(&self.state, &request, Role::Engineer).await?;
        let r = request.into_inner();
        let id = fit_id(r.fit_id)?;
        let detail = ops::fits::approve(
            &self.state,
            &who.label,
            id,
            r.reason.as_deref(),
            r.overriding,
        )
        .await
        .map_err(status)?;
        Ok(Response::new(fit_result(detail)?))
    }

    async fn reject_fit(
        &self,
        request: Request<proto::RejectFitRequest>,
    ) -> Result<Response<proto::FitResult>, Status> {
        let who = caller(&self.state, &request, Role::Engineer).await?;
        let r = request.into_inner();
        let id = fit_id(r.fit_id)?;
        let detail = ops::fits::reject(&self.state, &who.label, id, &r.reason)
            .await
            .map_err(status)?;
        Ok(Response::new(fit_result(detail)?))
    }

    async fn get_fit_curves(
        &self,
        request: Request<FitRef>,
    ) -> Result<Response<proto::FitCurves>, Status> {
        caller(&self.state, &request, Role::Reader).await?;
        let id = fit_id(request.into_inner().fit_id)?;
        let curves = ops::fits::curves(&self.state, id).await.map_err(status)?;
        Ok(Response::new(convert::fit_curves(curves)))
    }

    async fn get_sweep_file(
        &self,
        request: Request<proto::SweepRef>,
    ) -> Result<Response<proto::SweepFile>, Status> {
        caller(&self.state, &request, Role::Reader).await?;
        let id = request.into_inner().sweep_id;
        if id <= 0 {
            return Err(Status::invalid_argument(format!(
                "sweep_id must be a sweep's id (a positive number), not {id}"
            )));
        }
        let f = ops::sweeps::sweep_file(&self.state, id)
            .await
            .map_err(status)?;
        Ok(Response::new(proto::SweepFile {
            file_name: f.name,
            content: f.bytes,
        }))
    }

    async fn get_fit_report(
        &self,
        request: Request<proto::FitReportRequest>,
    ) -> Result<Response<proto::FitReportDocument>, Status> {
        caller(&self.state, &request, Role::Reader).await?;
        let r = request.into_inner();
        let id = fit_id(r.fit_id)?;
        let document = match proto::ReportFormat::try_from(r.format) {
            Ok(proto::ReportFormat::Html) => proto::FitReportDocument {
                content_type: "text/html; charset=utf-8".into(),
                file_name: None,
                content: ops::report::html(&self.state, id)
                    .await
                    .map_err(status)?
                    .into_bytes(),
            },
            Ok(proto::ReportFormat::Pdf) => {
                let (name, bytes) = ops::report::pdf(&self.state, id).await.map_err(status)?;
                proto::FitReportDocument {
                    content_type: "application/pdf".into(),
                    file_name: Some(name),
                    content: bytes,
                }
            }
            _ => {
                return Err(Status::invalid_argument(
                    "format must be REPORT_FORMAT_HTML or REPORT_FORMAT_PDF",
                ));
            }
        };
        Ok(Response::new(document))
    }
}

/// A fit's detail with its stored report as one message.
fn fit_result(detail: crate::registry::wire::FitDetail) -> Result<proto::FitResult, Status> {
    let id = detail.summary.fit_id;
    let report = detail
        .report
        .clone()
        .map(serde_json::from_value)
        .transpose()
        .map_err(|e| status(OpsError::internal(format!("fit {id}: stored report: {e}"))))?;
    convert::fit_result(detail, report)
        .map_err(|e| status(OpsError::internal(format!("fit {id}: {e}"))))
}
