//! The RPC handlers of `hypsogrid.v1.ProductService`: isolines, charts, rain–snow guidance,
//! ensemble statistics and verification, on the cycles the store holds.
//!
//! They share the height service's handler state and its way through a call (authenticate,
//! take a slot, fix the deadline, one store snapshot, work on a blocking thread) and call the
//! same library functions as the command line (`crate::products::orders` and friends), so a
//! chart from `RenderChart` and one from `hypsogrid chart` on the same file are the same bytes.

use tonic::{Request, Response, Status};
use tracing::field::Empty;

use super::convert::{missing, rfc3339, FieldError};
use super::handlers::{blocking, find_cycle, HeightServiceHandlers};
use super::status;
use crate::pb;
use crate::pb::product_service_server::ProductService;
use crate::products::ensemble::{ensemble_at_points, ensemble_grid, EnsembleStatistic};
use crate::products::guidance::{
    guidance_at_point, guidance_on, GuidanceError, GuidanceSettings, PointGuidance,
    PrecipitationType, CAUTION,
};
use crate::products::orders::{
    field_chart, field_isolines, guidance_chart, isolines_geojson, resolve, ChartOptions,
    FieldChoice, LevelChoice, Resolved,
};
use crate::products::verify::{
    consistency, verify, ConsistencyRequest, Region, ReportKind, TruthSource, VerifyReport,
    VerifyRequest,
};
use crate::products::ProductError;
use crate::query::{select_area, Quantity, TimeSelector};

/// Most points one guidance or ensemble point request may name.
const MAX_PRODUCT_POINTS: usize = 10_000;

/// A field selection from the wire: cycle id, time, member, quantity (optional for requests
/// that ignore it), extrapolation.
struct Selection {
    cycle_id: String,
    time: Option<TimeSelector>,
    member: usize,
    quantity: Option<Quantity>,
    allow_extrapolation: bool,
}

impl Selection {
    fn from_wire(f: Option<&pb::FieldSelection>) -> Result<Self, FieldError> {
        let Some(f) = f else {
            // Every part has a default: the newest cycle, the first step, member 0.
            return Ok(Self {
                cycle_id: String::new(),
                time: None,
                member: 0,
                quantity: None,
                allow_extrapolation: false,
            });
        };
        let time = f
            .time
            .as_ref()
            .map(TimeSelector::try_from)
            .transpose()
            .map_err(|e| e.within("field.time"))?;
        let quantity = f
            .quantity
            .as_ref()
            .map(Quantity::try_from)
            .transpose()
            .map_err(|e| e.within("field.quantity"))?;
        Ok(Self {
            cycle_id: f.cycle_id.clone(),
            time,
            member: f.member as usize,
            quantity,
            allow_extrapolation: f.allow_extrapolation,
        })
    }

    fn choice(&self) -> Result<FieldChoice, FieldError> {
        Ok(FieldChoice {
            quantity: self.quantity.ok_or_else(|| missing("field.quantity"))?,
            time: self.time,
            member: self.member,
            allow_extrapolation: self.allow_extrapolation,
        })
    }
}

fn resolved_field(r: &Resolved) -> pb::ResolvedField {
    pb::ResolvedField {
        cycle_id: r.cycle_id.clone(),
        lead_time_s: r.lead_time_s,
        valid_time: rfc3339(r.valid_time_unix_s),
        reference_time: rfc3339(r.reference_time_unix_s),
        member: r.member as u32,
    }
}

/// The server's guidance settings (common-practice defaults) with the request's overrides.
/// The server's guidance settings (`base`) with the request's thresholds, where it gives
/// them, in place of the critical thicknesses.
fn guidance_settings(
    base: &GuidanceSettings,
    t: Option<&pb::GuidanceThresholds>,
) -> Result<GuidanceSettings, Status> {
    let mut s = base.clone();
    if let Some(t) = t {
        if let Some(v) = t.thickness_1000_500_m {
            s.critical_1000_500_m = v;
        }
        if let Some(v) = t.thickness_1000_850_m {
            s.critical_1000_850_m = v;
        }
        if let Some(v) = t.thickness_850_700_m {
            s.critical_850_700_m = v;
        }
    }
    s.validate()
        .map_err(|e| status::product_error(ProductError::Guidance(e), "field"))?;
    Ok(s)
}

impl HeightServiceHandlers {
    /// This server's guidance settings in force, with the request's thresholds.
    fn guidance_for(&self, t: Option<&pb::GuidanceThresholds>) -> Result<GuidanceSettings, Status> {
        guidance_settings(&self.settings().guidance.current(), t)
    }
}

fn thresholds(s: &GuidanceSettings) -> pb::GuidanceThresholds {
    pb::GuidanceThresholds {
        thickness_1000_500_m: Some(s.critical_1000_500_m),
        thickness_1000_850_m: Some(s.critical_1000_850_m),
        thickness_850_700_m: Some(s.critical_850_700_m),
    }
}

fn statistic(
    s: Option<&pb::EnsembleStatistic>,
    field: &str,
) -> Result<EnsembleStatistic, FieldError> {
    use pb::ensemble_statistic::Kind;
    match s.and_then(|s| s.kind.as_ref()) {
        Some(Kind::Mean(_)) => Ok(EnsembleStatistic::Mean),
        Some(Kind::Spread(_)) => Ok(EnsembleStatistic::Spread),
        Some(Kind::ProbabilityBelow(t)) => Ok(EnsembleStatistic::ProbabilityBelow(*t)),
        Some(Kind::ProbabilityAbove(t)) => Ok(EnsembleStatistic::ProbabilityAbove(*t)),
        None => Err(FieldError::new(
            field,
            "set one of mean, spread, probability_below or probability_above",
        )),
    }
}

fn statistic_wire(s: &EnsembleStatistic) -> pb::EnsembleStatistic {
    use pb::ensemble_statistic::Kind;
    let kind = match *s {
        EnsembleStatistic::Mean => Kind::Mean(true),
        EnsembleStatistic::Spread => Kind::Spread(true),
        EnsembleStatistic::ProbabilityBelow(t) => Kind::ProbabilityBelow(t),
        EnsembleStatistic::ProbabilityAbove(t) => Kind::ProbabilityAbove(t),
    };
    pb::EnsembleStatistic { kind: Some(kind) }
}

/// The guidance caution when any statistic is a threshold probability (P(1000–500 hPa <
/// 5400 m) is read as rain–snow guidance), else empty.
fn probability_caution(stats: &[EnsembleStatistic]) -> String {
    let probability = stats.iter().any(|s| {
        matches!(
            s,
            EnsembleStatistic::ProbabilityBelow(_) | EnsembleStatistic::ProbabilityAbove(_)
        )
    });
    if probability {
        CAUTION.to_string()
    } else {
        String::new()
    }
}

fn points(ps: &[pb::GeoPoint]) -> Result<Vec<(f64, f64)>, FieldError> {
    if ps.is_empty() {
        return Err(FieldError::new(
            "points",
            "no point given: give at least one",
        ));
    }
    if ps.len() > MAX_PRODUCT_POINTS {
        return Err(FieldError::new(
            "points",
            format!(
                "{} points asked for; at most {MAX_PRODUCT_POINTS} per request",
                ps.len()
            ),
        ));
    }
    Ok(ps
        .iter()
        .map(|p| (p.latitude_deg, p.longitude_deg))
        .collect())
}

fn region(r: &pb::VerifyRegion, index: usize) -> Result<Region, FieldError> {
    use pb::verify_region::Kind;
    match &r.kind {
        Some(Kind::WholeDomain(_)) => Ok(Region::Global),
        Some(Kind::NorthernExtratropics(_)) => Ok(Region::NorthernExtratropics),
        Some(Kind::SouthernExtratropics(_)) => Ok(Region::SouthernExtratropics),
        Some(Kind::Tropics(_)) => Ok(Region::Tropics),
        Some(Kind::Box(b)) => {
            let bbox = b
                .bbox
                .as_ref()
                .ok_or_else(|| missing(&format!("regions[{index}].box.bbox")))?;
            Ok(Region::Box(crate::query::BoundingBox::from(bbox)))
        }
        None => Err(FieldError::new(
            format!("regions[{index}]"),
            "set whole_domain, one of the WMO-No. 485 regions, or box",
        )),
    }
}

fn verify_response(report: &VerifyReport) -> pb::VerifyResponse {
    let truth = match report.truth_source {
        TruthSource::FileHeights => "file_heights",
        TruthSource::Computed => "computed",
        TruthSource::Mixed => "mixed",
    };
    pb::VerifyResponse {
        forecast_cycle_id: report.forecast_id.clone(),
        analysis_cycle_id: match report.kind {
            ReportKind::ForecastVsAnalysis => report.analysis_id.clone(),
            ReportKind::Consistency => String::new(),
        },
        lead_time_s: report.lead_time_s,
        valid_time: report.valid_time.clone().unwrap_or_default(),
        truth_source: truth.to_string(),
        regridded: report.regridded,
        rows: report
            .rows
            .iter()
            .map(|r| pb::ScoreRow {
                level_hpa: r.level_hpa.unwrap_or(0.0),
                layer_bottom_hpa: r.layer_bottom_hpa.unwrap_or(0.0),
                layer_top_hpa: r.layer_top_hpa.unwrap_or(0.0),
                region: r.region.clone(),
                count: r.scores.count as u64,
                weight_sum: r.scores.weight_sum,
                bias_m: r.scores.bias_m,
                rmse_m: r.scores.rmse_m,
                mae_m: r.scores.mae_m,
                sd_m: r.scores.sd_m,
                corr: r.scores.corr,
            })
            .collect(),
        notes: report.notes.clone(),
    }
}

fn point_guidance(p: &PointGuidance) -> pb::PointGuidance {
    pb::PointGuidance {
        point: Some(pb::GeoPoint {
            latitude_deg: p.latitude,
            longitude_deg: p.longitude,
        }),
        thickness_1000_500_m: p.thickness_1000_500.value_m,
        thickness_1000_850_m: p.thickness_1000_850.value_m,
        thickness_850_700_m: p.thickness_850_700.value_m,
        freezing_level_m: p.freezing_level_m,
        freezing_level_above_ground_m: p.freezing_level_agl_m,
        wet_bulb_zero_m: p.wet_bulb_zero_m,
        wet_bulb_zero_above_ground_m: p.wet_bulb_zero_agl_m,
        surface_height_m: p.nearest_column.inputs.surface_height_m,
        category: i32::from(p.nearest_column.category.code()),
        rule: p.nearest_column.rule.name().to_string(),
    }
}

/// Runs product work on a blocking thread and maps its error.
async fn product<R: Send + 'static>(
    call: &super::handlers::Call,
    selection: &'static str,
    work: impl FnOnce() -> Result<R, ProductError> + Send + 'static,
) -> Result<R, Status> {
    blocking(call, work)
        .await?
        .map_err(|e| status::product_error(e, selection))
}

#[tonic::async_trait]
impl ProductService for HeightServiceHandlers {
    #[tracing::instrument(skip_all, fields(method = "GetIsolines", cycle_id = Empty, latency_ms = Empty, response_bytes = Empty, code = Empty))]
    async fn get_isolines(
        &self,
        request: Request<pb::IsolinesRequest>,
    ) -> Result<Response<pb::IsolinesResponse>, Status> {
        self.answer(request, |call, r| async move {
            let selection = Selection::from_wire(r.field.as_ref())?;
            let choice = selection.choice()?;
            let levels = match (r.interval, r.values.is_empty()) {
                (Some(interval), true) => LevelChoice::Interval {
                    interval,
                    base: r.base,
                },
                (None, false) => LevelChoice::Values(r.values.clone()),
                (Some(_), false) => {
                    return Err(
                        FieldError::new("interval", "give values or interval, not both").into(),
                    )
                }
                (None, true) => {
                    return Err(FieldError::new(
                        "values",
                        "give the values to draw, or an interval",
                    )
                    .into())
                }
            };
            let lc = find_cycle(&call.snapshot, &selection.cycle_id)?;
            let include_geojson = r.include_geojson;
            let answer = product(&call, "field", move || {
                let lines = field_isolines(&lc, &choice, &levels)?;
                let geojson = if include_geojson {
                    isolines_geojson(&lines)
                } else {
                    String::new()
                };
                Ok((lines, geojson))
            })
            .await?;
            let (lines, geojson) = answer;
            Ok(pb::IsolinesResponse {
                field: Some(resolved_field(&lines.resolved)),
                quantity: Some(pb::Quantity::from(&lines.quantity)),
                isolines: lines
                    .lines
                    .iter()
                    .map(|l| pb::Isoline {
                        value: l.value,
                        closed: l.closed,
                        points: l
                            .points
                            .iter()
                            .map(|p| pb::GeoPoint {
                                latitude_deg: p[1],
                                longitude_deg: p[0],
                            })
                            .collect(),
                    })
                    .collect(),
                geojson,
            })
        })
        .await
    }

    #[tracing::instrument(skip_all, fields(method = "RenderChart", cycle_id = Empty, latency_ms = Empty, response_bytes = Empty, code = Empty))]
    async fn render_chart(
        &self,
        request: Request<pb::ChartRequest>,
    ) -> Result<Response<pb::ChartResponse>, Status> {
        self.answer(request, |call, r| async move {
            let selection = Selection::from_wire(r.field.as_ref())?;
            let kind = pb::ChartKind::try_from(r.kind)
                .map_err(|_| FieldError::new("kind", format!("unknown chart kind {}", r.kind)))?;
            let defaults = ChartOptions::default();
            let options = ChartOptions {
                interval: r.interval.unwrap_or(defaults.interval),
                base: 0.0,
                critical: if r.critical.is_empty() {
                    None
                } else {
                    Some(r.critical.clone())
                },
                fill: r.fill,
                width: r.width.unwrap_or(defaults.width),
                height: r.height.unwrap_or(defaults.height),
            };
            let lc = find_cycle(&call.snapshot, &selection.cycle_id)?;
            let chart = match kind {
                pb::ChartKind::Field => {
                    let choice = selection.choice()?;
                    product(&call, "field", move || field_chart(&lc, &choice, &options)).await?
                }
                pb::ChartKind::PrecipitationType => {
                    let settings = self.guidance_for(r.thresholds.as_ref())?;
                    let (time, member) = (selection.time, selection.member);
                    product(&call, "field", move || {
                        guidance_chart(&lc, time.as_ref(), member, &settings, &options)
                    })
                    .await?
                }
            };
            // Leave room for the rest of the message and its framing.
            let limit = self.settings().max_message_bytes.saturating_sub(1024);
            if chart.png.len() > limit {
                return Err(status::resource_exhausted(
                    "width",
                    &format!(
                        "the chart is {} bytes of PNG, more than the server's message limit allows ({limit}): ask for a smaller width and height",
                        chart.png.len()
                    ),
                ));
            }
            Ok(pb::ChartResponse {
                field: Some(resolved_field(&chart.resolved)),
                png: chart.png,
                caution: chart.caution.unwrap_or_default().to_string(),
            })
        })
        .await
    }

    #[tracing::instrument(skip_all, fields(method = "GetGuidanceArea", cycle_id = Empty, latency_ms = Empty, response_bytes = Empty, code = Empty))]
    async fn get_guidance_area(
        &self,
        request: Request<pb::GuidanceAreaRequest>,
    ) -> Result<Response<pb::GuidanceAreaResponse>, Status> {
        self.answer(request, |call, r| async move {
            let selection = Selection::from_wire(r.field.as_ref())?;
            let bbox = crate::query::BoundingBox::from(r.bbox.as_ref().ok_or_else(|| missing("bbox"))?);
            let stride = r.stride.unwrap_or(1) as usize;
            let settings = self.guidance_for(r.thresholds.as_ref())?;
            let lc = find_cycle(&call.snapshot, &selection.cycle_id)?;
            let (time, member) = (selection.time, selection.member);
            let limit = self.settings().limits.max_points;
            let answer = product(&call, "field", move || {
                let resolved = resolve(&lc, time.as_ref(), member)?;
                let area = select_area(&lc, &bbox, stride)?;
                let n = area.rows.len() * area.cols.len();
                if n.saturating_mul(6) > limit {
                    return Err(ProductError::Query(crate::query::QueryError::ResourceExhausted {
                        field: "bbox".to_string(),
                        message: format!(
                            "{n} points × 6 values exceed the server's limit of {limit} point-values: ask for a smaller box or a larger stride"
                        ),
                    }));
                }
                // Only the area's own columns: the whole grid would cost a global grid's
                // columns for a box of a few points.
                let g = guidance_on(
                    &lc,
                    (resolved.time_index, member),
                    &settings,
                    &area.rows,
                    &area.cols,
                )?;
                Ok((resolved, area, g, settings))
            })
            .await?;
            let (resolved, area, g, settings) = answer;
            // The answer's arrays are the area's rows and columns in the area's order.
            let pick = |a: &ndarray::Array2<f32>| -> Vec<f32> { a.iter().copied().collect() };
            let category: Vec<u8> = g.category.iter().copied().collect();
            let mut counts = vec![0u64; PrecipitationType::ALL.len()];
            for &c in &category {
                if let Some(n) = counts.get_mut(usize::from(c)) {
                    *n += 1;
                }
            }
            Ok(pb::GuidanceAreaResponse {
                field: Some(resolved_field(&resolved)),
                latitudes_deg: area.latitudes.clone(),
                longitudes_deg: area.longitudes.clone(),
                thickness_1000_500_m: pick(&g.thickness_1000_500),
                thickness_1000_850_m: pick(&g.thickness_1000_850),
                thickness_850_700_m: pick(&g.thickness_850_700),
                freezing_level_m: pick(&g.freezing_level_m),
                wet_bulb_zero_m: pick(&g.wet_bulb_zero_m),
                category,
                category_counts: counts,
                thresholds: Some(thresholds(&settings)),
                caution: CAUTION.to_string(),
            })
        })
        .await
    }

    #[tracing::instrument(skip_all, fields(method = "GetGuidancePoints", cycle_id = Empty, latency_ms = Empty, response_bytes = Empty, code = Empty))]
    async fn get_guidance_points(
        &self,
        request: Request<pb::GuidancePointsRequest>,
    ) -> Result<Response<pb::GuidancePointsResponse>, Status> {
        self.answer(request, |call, r| async move {
            let selection = Selection::from_wire(r.field.as_ref())?;
            let pts = points(&r.points)?;
            let settings = self.guidance_for(r.thresholds.as_ref())?;
            let lc = find_cycle(&call.snapshot, &selection.cycle_id)?;
            let (time, member) = (selection.time, selection.member);
            let answer = product(&call, "field", move || {
                let resolved = resolve(&lc, time.as_ref(), member)?;
                let mut out = Vec::with_capacity(pts.len());
                for (i, &(lat, lon)) in pts.iter().enumerate() {
                    let p =
                        guidance_at_point(&lc, lat, lon, resolved.time_index, member, &settings)
                            .map_err(|e| match e {
                                // A point off the grid is that point's fault; anything else
                                // (the cycle's fields, the member) maps as for the area.
                                GuidanceError::Position(_) => {
                                    ProductError::Query(crate::query::QueryError::OutOfRange {
                                        field: format!("points[{i}]"),
                                        message: e.to_string(),
                                    })
                                }
                                other => ProductError::Guidance(other),
                            })?;
                    out.push(p);
                }
                Ok((resolved, out, settings))
            })
            .await?;
            let (resolved, out, settings) = answer;
            Ok(pb::GuidancePointsResponse {
                field: Some(resolved_field(&resolved)),
                points: out.iter().map(point_guidance).collect(),
                thresholds: Some(thresholds(&settings)),
                caution: CAUTION.to_string(),
            })
        })
        .await
    }

    #[tracing::instrument(skip_all, fields(method = "GetEnsembleArea", cycle_id = Empty, latency_ms = Empty, response_bytes = Empty, code = Empty))]
    async fn get_ensemble_area(
        &self,
        request: Request<pb::EnsembleAreaRequest>,
    ) -> Result<Response<pb::EnsembleAreaResponse>, Status> {
        self.answer(request, |call, r| async move {
            let selection = Selection::from_wire(r.field.as_ref())?;
            let quantity = selection.choice()?.quantity;
            let stat = statistic(r.statistic.as_ref(), "statistic")?;
            let bbox =
                crate::query::BoundingBox::from(r.bbox.as_ref().ok_or_else(|| missing("bbox"))?);
            let stride = r.stride.unwrap_or(1) as usize;
            let lc = find_cycle(&call.snapshot, &selection.cycle_id)?;
            let time = selection.time;
            let answer = product(&call, "field", move || {
                let resolved = resolve(&lc, time.as_ref(), 0)?;
                let area = select_area(&lc, &bbox, stride)?;
                let f = ensemble_grid(&lc, &quantity, resolved.time_index, stat)?;
                let values: Vec<f32> = area
                    .rows
                    .iter()
                    .flat_map(|&row| area.cols.iter().map(move |&col| (row, col)))
                    .map(|(row, col)| f.values[[row, col]] as f32)
                    .collect();
                Ok((resolved, area, values, f.members))
            })
            .await?;
            let (resolved, area, values, members) = answer;
            Ok(pb::EnsembleAreaResponse {
                field: Some(resolved_field(&resolved)),
                statistic: Some(statistic_wire(&stat)),
                members: members as u32,
                latitudes_deg: area.latitudes,
                longitudes_deg: area.longitudes,
                values,
                caution: probability_caution(std::slice::from_ref(&stat)),
            })
        })
        .await
    }

    #[tracing::instrument(skip_all, fields(method = "GetEnsemblePoints", cycle_id = Empty, latency_ms = Empty, response_bytes = Empty, code = Empty))]
    async fn get_ensemble_points(
        &self,
        request: Request<pb::EnsemblePointsRequest>,
    ) -> Result<Response<pb::EnsemblePointsResponse>, Status> {
        self.answer(request, |call, r| async move {
            let selection = Selection::from_wire(r.field.as_ref())?;
            let quantity = selection.choice()?.quantity;
            let pts = points(&r.points)?;
            let stats = r
                .statistics
                .iter()
                .enumerate()
                .map(|(i, s)| statistic(Some(s), &format!("statistics[{i}]")))
                .collect::<Result<Vec<_>, _>>()?;
            let lc = find_cycle(&call.snapshot, &selection.cycle_id)?;
            let time = selection.time;
            let stats2 = stats.clone();
            let answer = product(&call, "field", move || {
                let resolved = resolve(&lc, time.as_ref(), 0)?;
                let out = ensemble_at_points(&lc, &pts, &quantity, resolved.time_index, &stats2)?;
                Ok((resolved, out, lc.cycle.members))
            })
            .await?;
            let (resolved, out, members) = answer;
            Ok(pb::EnsemblePointsResponse {
                field: Some(resolved_field(&resolved)),
                statistics: stats.iter().map(statistic_wire).collect(),
                members: members as u32,
                caution: probability_caution(&stats),
                points: out
                    .into_iter()
                    .map(|p| pb::PointEnsemble {
                        point: Some(pb::GeoPoint {
                            latitude_deg: p.latitude,
                            longitude_deg: p.longitude,
                        }),
                        values: p.values,
                        members_used: p.members_used as u32,
                    })
                    .collect(),
            })
        })
        .await
    }

    #[tracing::instrument(skip_all, fields(method = "Verify", cycle_id = Empty, latency_ms = Empty, response_bytes = Empty, code = Empty))]
    async fn verify(
        &self,
        request: Request<pb::VerifyRequest>,
    ) -> Result<Response<pb::VerifyResponse>, Status> {
        self.answer(request, |call, r| async move {
            let items = r
                .quantities
                .iter()
                .enumerate()
                .map(|(i, q)| {
                    Quantity::try_from(q).map_err(|e| e.within(&format!("quantities[{i}]")))
                })
                .collect::<Result<Vec<_>, _>>()?;
            let regions = r
                .regions
                .iter()
                .enumerate()
                .map(|(i, g)| region(g, i))
                .collect::<Result<Vec<_>, _>>()?;
            let forecast = find_cycle(&call.snapshot, &r.forecast_cycle_id)?;
            let (member, include_below_ground) = (r.member as usize, r.include_below_ground);
            let report = if r.analysis_cycle_id.is_empty() {
                let request = ConsistencyRequest {
                    items,
                    regions,
                    member,
                    time: r
                        .lead_time_s
                        .map(|seconds| TimeSelector::LeadTime { seconds }),
                    include_below_ground,
                };
                product(&call, "", move || Ok(consistency(&forecast, &request)?)).await?
            } else {
                let analysis = find_cycle(&call.snapshot, &r.analysis_cycle_id).map_err(|s| {
                    Status::new(s.code(), format!("analysis_cycle_id: {}", s.message()))
                })?;
                let request = VerifyRequest {
                    items,
                    regions,
                    member,
                    lead_time_s: r.lead_time_s,
                    include_below_ground,
                    ..VerifyRequest::default()
                };
                product(&call, "", move || {
                    Ok(verify(&forecast, &analysis, &request)?)
                })
                .await?
            };
            Ok(verify_response(&report))
        })
        .await
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn statistics_round_trip_through_the_wire() {
        for s in [
            EnsembleStatistic::Mean,
            EnsembleStatistic::Spread,
            EnsembleStatistic::ProbabilityBelow(5400.0),
            EnsembleStatistic::ProbabilityAbove(1300.0),
        ] {
            assert_eq!(
                statistic(Some(&statistic_wire(&s)), "statistic").unwrap(),
                s
            );
        }
        assert_eq!(statistic(None, "statistic").unwrap_err().field, "statistic");
    }

    #[test]
    fn threshold_overrides_replace_only_what_is_set() {
        // A server whose own settings differ from the defaults: the request's threshold
        // replaces one critical thickness, everything else stays the server's.
        let base = GuidanceSettings {
            critical_1000_850_m: 1290.0,
            search_top_hpa: 400.0,
            ..GuidanceSettings::default()
        };
        let s = guidance_settings(
            &base,
            Some(&pb::GuidanceThresholds {
                thickness_1000_500_m: Some(5280.0),
                ..Default::default()
            }),
        )
        .unwrap();
        assert_eq!(s.critical_1000_500_m, 5280.0);
        assert_eq!(s.critical_1000_850_m, 1290.0);
        assert_eq!(s.critical_850_700_m, base.critical_850_700_m);
        assert_eq!(s.search_top_hpa, 400.0);
        // No thresholds: the server's settings as they are.
        let same = guidance_settings(&base, None).unwrap();
        assert_eq!(same.critical_1000_850_m, 1290.0);
        assert_eq!(same.critical_1000_500_m, base.critical_1000_500_m);
    }
}
