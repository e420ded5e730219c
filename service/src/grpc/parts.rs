//! `PartRegistry`: behavioural part queries, one part's record and its trend (reader), creating a part
//! and setting its limits (engineer), as over HTTP and through the same operations of [`crate::ops`].

use super::proto::part_registry_server::PartRegistry;
use super::proto::{self, GetPartRequest, QueryPartsRequest};
use super::{caller, convert, status};
use crate::app::AppState;
use crate::ops;
use crate::ops::parts::PartQueryInput;
use crate::registry::ids::PartNumber;
use crate::store::tokens::Role;
use tonic::{Request, Response, Status};

pub struct Parts {
    pub state: AppState,
}

/// The part a request names, as HTTP reads its path ([`ops::parts::named`]); proto3's default ""
/// means the field was not set.
fn part_number(text: &str) -> Result<PartNumber, Status> {
    if text.trim().is_empty() {
        return Err(Status::invalid_argument("part_number is required"));
    }
    ops::parts::named(text).map_err(status)
}

#[tonic::async_trait]
impl PartRegistry for Parts {
    async fn query_parts(
        &self,
        request: Request<QueryPartsRequest>,
    ) -> Result<Response<proto::PartPage>, Status> {
        caller(&self.state, &request, Role::Reader).await?;
        let r = request.into_inner();
        let input = PartQueryInput {
            q: r.q,
            answer_from: r.answer_from,
            approved_only: r.approved_only.then_some(true),
            srf_min_hz: r.srf_min_hz,
            srf_max_hz: r.srf_max_hz,
            series_resonance_min_hz: r.series_resonance_min_hz,
            series_resonance_max_hz: r.series_resonance_max_hz,
            l_at_hz: r.l_at_hz,
            l_min_h: r.l_min_h,
            l_max_h: r.l_max_h,
            dcr_max_ohm: r.dcr_max_ohm,
            z_min_ohm: r.z_min_ohm,
            z_band_min_hz: r.z_band_min_hz,
            z_band_max_hz: r.z_band_max_hz,
            core_corner_min_hz: r.core_corner_min_hz,
            core_corner_max_hz: r.core_corner_max_hz,
            sort: r.sort,
            limit: r.limit,
            cursor: r.cursor,
        };
        let page = ops::parts::query(&self.state, input)
            .await
            .map_err(status)?;
        Ok(Response::new(convert::part_page(page)))
    }

    async fn get_part(
        &self,
        request: Request<GetPartRequest>,
    ) -> Result<Response<proto::Part>, Status> {
        caller(&self.state, &request, Role::Reader).await?;
        let pn = part_number(&request.into_inner().part_number)?;
        let part = ops::parts::get(&self.state, &pn).await.map_err(status)?;
        Ok(Response::new(convert::part(part)))
    }

    async fn create_part(
        &self,
        request: Request<proto::CreatePartRequest>,
    ) -> Result<Response<proto::Part>, Status> {
        let who = caller(&self.state, &request, Role::Engineer).await?;
        let r = request.into_inner();
        let limits = convert::limits_from(r.limits);
        let part = ops::parts::create(
            &self.state,
            &who.label,
            &r.part_number,
            &r.description,
            &limits,
        )
        .await
        .map_err(status)?;
        Ok(Response::new(convert::part(part)))
    }

    async fn set_limits(
        &self,
        request: Request<proto::SetLimitsRequest>,
    ) -> Result<Response<proto::Part>, Status> {
        let who = caller(&self.state, &request, Role::Engineer).await?;
        let r = request.into_inner();
        let pn = part_number(&r.part_number)?;
        let limits = convert::limits_from(r.limits);
        let part = ops::parts::set_limits(&self.state, &who.label, &pn, &limits)
            .await
            .map_err(status)?;
        Ok(Response::new(convert::part(part)))
    }

    async fn get_part_trend(
        &self,
        request: Request<GetPartRequest>,
    ) -> Result<Response<proto::PartTrend>, Status> {
        caller(&self.state, &request, Role::Reader).await?;
        let pn = part_number(&request.into_inner().part_number)?;
        let trend = ops::parts::trend(&self.state, &pn).await.map_err(status)?;
        Ok(Response::new(convert::part_trend(trend)))
    }
}
