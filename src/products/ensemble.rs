//! Ensemble statistics of a quantity: mean, spread and threshold probabilities over the
//! members of a cycle, on whole grids and at positions.
//!
//! # Definitions
//! At each point, over the members whose value is finite (members with `NaN` there are
//! skipped, and the number used is reported):
//! - mean: the arithmetic mean;
//! - spread: the sample standard deviation about the ensemble mean, dividing by `n − 1`
//!   (Bessel's correction, the unbiased estimate of the variance). This is common practice
//!   in ensemble verification, where spread is compared with the error of the ensemble mean
//!   (Fortin et al. 2014, *J. Hydrometeor.* 15, 1708–1713, argue for the unbiased variance
//!   in spread–skill comparisons; from memory). With fewer than two usable members it is
//!   `NaN`;
//! - probability below (above) a threshold: the fraction of usable members whose value is
//!   strictly below (above) it; a member exactly on the threshold counts in neither.
//!
//! Every statistic is `NaN` where no member is usable.
//!
//! Thresholds such as 5400 m for the 1000–500 hPa thickness are rules of thumb that depend on
//! local climate and terrain (GUIDE §3). A probability of a thickness below a rain–snow
//! threshold is guidance derived from model fields, not a forecast or a warning: defer to
//! official services, local practice and licensed forecasters. Outputs that show such a
//! probability should carry [`crate::products::guidance::CAUTION`] beside it.
//!
//! Member values come from [`crate::query::grid_field`] (grids) and
//! [`crate::query::position`] (points, bilinear per member), so they equal the queries'
//! answers for each member; pressures outside the levels are not extrapolated.

use ndarray::Array2;
use serde::Serialize;

use crate::query::{
    grid_field, position, Interpolation, Limits, LoadedCycle, PositionQuery, Quantity, QueryError,
    TimeSelector,
};

/// One statistic over the members.
#[derive(Clone, Copy, Debug, PartialEq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum EnsembleStatistic {
    /// Ensemble mean, geopotential metres.
    Mean,
    /// Sample standard deviation about the ensemble mean (`n − 1`), geopotential metres.
    Spread,
    /// Fraction of members strictly below the threshold (geopotential metres), 0–1.
    ProbabilityBelow(f64),
    /// Fraction of members strictly above the threshold (geopotential metres), 0–1.
    ProbabilityAbove(f64),
}

impl EnsembleStatistic {
    /// Short name for reports: `mean`, `spread`, `probability_below_5400`, ...
    pub fn label(&self) -> String {
        match self {
            EnsembleStatistic::Mean => "mean".to_string(),
            EnsembleStatistic::Spread => "spread".to_string(),
            EnsembleStatistic::ProbabilityBelow(t) => format!("probability_below_{t}"),
            EnsembleStatistic::ProbabilityAbove(t) => format!("probability_above_{t}"),
        }
    }

    /// Units of the statistic's values.
    pub fn units(&self) -> &'static str {
        match self {
            EnsembleStatistic::Mean | EnsembleStatistic::Spread => "m",
            EnsembleStatistic::ProbabilityBelow(_) | EnsembleStatistic::ProbabilityAbove(_) => "1",
        }
    }
}

/// A statistic on the whole grid of one time step, in the file's row and column order.
#[derive(Clone, Debug, PartialEq)]
pub struct EnsembleField {
    /// The quantity.
    pub quantity: Quantity,
    /// The statistic.
    pub statistic: EnsembleStatistic,
    /// Index of the time step.
    pub time_index: usize,
    /// Lead time of the step, seconds.
    pub lead_time_s: i64,
    /// Valid time of the step, seconds since the Unix epoch, when known.
    pub valid_time_unix_s: Option<i64>,
    /// Members in the cycle.
    pub members: usize,
    /// Values `[row, col]` (metres for mean and spread, a fraction for probabilities); `NaN`
    /// where no member is usable (spread: fewer than two).
    pub values: Array2<f64>,
    /// Members with a finite value at each point, `[row, col]`.
    pub members_used: Array2<u32>,
}

/// Statistics at one position.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct PointEnsemble {
    /// Latitude asked for, degrees north.
    pub latitude: f64,
    /// Longitude asked for, degrees east.
    pub longitude: f64,
    /// Each member's bilinear value, geopotential metres (`NaN`, serialised as null, where
    /// masked).
    pub member_values: Vec<f64>,
    /// Members with a finite value.
    pub members_used: usize,
    /// One value per requested statistic, in request order.
    pub values: Vec<f64>,
}

/// Why ensemble statistics cannot be computed. Messages name the file.
#[derive(Debug, thiserror::Error)]
pub enum EnsembleError {
    /// The cycle has one member.
    #[error("'{file}' is a deterministic cycle (one member): ensemble statistics need two or more members")]
    Deterministic {
        /// Cycle id.
        file: String,
    },
    /// A threshold that is not a finite number.
    #[error("statistics[{index}]: threshold {threshold} is not a finite number of metres")]
    BadThreshold {
        /// Index of the statistic in the request.
        index: usize,
        /// The threshold given.
        threshold: f64,
    },
    /// No statistic was asked for.
    #[error("statistics: none asked for: give at least one of mean, spread or a probability")]
    NoStatistic,
    /// A member's quantity could not be answered.
    #[error("'{file}': {source}")]
    Query {
        /// Cycle id.
        file: String,
        /// The query's own error (naming the request field).
        #[source]
        source: QueryError,
    },
}

fn check_request(lc: &LoadedCycle, statistics: &[EnsembleStatistic]) -> Result<(), EnsembleError> {
    if lc.cycle.members < 2 {
        return Err(EnsembleError::Deterministic {
            file: lc.id.clone(),
        });
    }
    if statistics.is_empty() {
        return Err(EnsembleError::NoStatistic);
    }
    for (index, s) in statistics.iter().enumerate() {
        if let EnsembleStatistic::ProbabilityBelow(t) | EnsembleStatistic::ProbabilityAbove(t) = *s
        {
            if !t.is_finite() {
                return Err(EnsembleError::BadThreshold {
                    index,
                    threshold: t,
                });
            }
        }
    }
    Ok(())
}

/// Running statistics of one point over the members: Welford's one-pass mean and sum of
/// squared deviations (numerically stable), and counts below and above each threshold.
///
/// # References
/// Welford, B. P. (1962), *Technometrics* 4, 419–420.
#[derive(Clone, Debug)]
struct Accumulator {
    n: u32,
    mean: f64,
    m2: f64,
    /// One count per statistic (used by the probabilities only).
    counts: Vec<u32>,
}

impl Accumulator {
    fn new(statistics: usize) -> Self {
        Self {
            n: 0,
            mean: 0.0,
            m2: 0.0,
            counts: vec![0; statistics],
        }
    }

    fn add(&mut self, x: f64, statistics: &[EnsembleStatistic]) {
        if !x.is_finite() {
            return;
        }
        self.n += 1;
        let delta = x - self.mean;
        self.mean += delta / f64::from(self.n);
        self.m2 += delta * (x - self.mean);
        for (count, s) in self.counts.iter_mut().zip(statistics) {
            match *s {
                EnsembleStatistic::ProbabilityBelow(t) if x < t => *count += 1,
                EnsembleStatistic::ProbabilityAbove(t) if x > t => *count += 1,
                _ => {}
            }
        }
    }

    fn value(&self, index: usize, statistic: &EnsembleStatistic) -> f64 {
        if self.n == 0 {
            return f64::NAN;
        }
        let n = f64::from(self.n);
        match statistic {
            EnsembleStatistic::Mean => self.mean,
            EnsembleStatistic::Spread if self.n >= 2 => (self.m2.max(0.0) / (n - 1.0)).sqrt(),
            EnsembleStatistic::Spread => f64::NAN,
            EnsembleStatistic::ProbabilityBelow(_) | EnsembleStatistic::ProbabilityAbove(_) => {
                f64::from(self.counts[index]) / n
            }
        }
    }
}

/// One statistic of a quantity over the members, on the whole grid of time step
/// `time_index` (see the module documentation for the definitions).
///
/// An error names the file of a deterministic cycle, and passes on the query's own error
/// for a quantity, member or time step the cycle cannot answer.
pub fn ensemble_grid(
    lc: &LoadedCycle,
    quantity: &Quantity,
    time_index: usize,
    statistic: EnsembleStatistic,
) -> Result<EnsembleField, EnsembleError> {
    let mut fields = ensemble_grids(lc, quantity, time_index, &[statistic])?;
    fields.pop().ok_or(EnsembleError::NoStatistic)
}

/// Several statistics of one quantity at once (each member's field is computed once), in
/// request order.
pub fn ensemble_grids(
    lc: &LoadedCycle,
    quantity: &Quantity,
    time_index: usize,
    statistics: &[EnsembleStatistic],
) -> Result<Vec<EnsembleField>, EnsembleError> {
    check_request(lc, statistics)?;
    let (rows, cols) = (lc.cycle.grid.rows(), lc.cycle.grid.cols());
    let mut acc = Array2::from_elem((rows, cols), Accumulator::new(statistics.len()));
    for member in 0..lc.cycle.members {
        let g = grid_field(lc, quantity, time_index, member, false).map_err(|source| {
            EnsembleError::Query {
                file: lc.id.clone(),
                source,
            }
        })?;
        ndarray::Zip::from(&mut acc)
            .and(&g.values)
            .par_for_each(|a, &v| a.add(f64::from(v), statistics));
    }
    let members_used = acc.mapv(|a| a.n);
    Ok(statistics
        .iter()
        .enumerate()
        .map(|(i, s)| EnsembleField {
            quantity: *quantity,
            statistic: *s,
            time_index,
            lead_time_s: lc.cycle.lead_times_s[time_index],
            valid_time_unix_s: lc.valid_time_unix_s(time_index),
            members: lc.cycle.members,
            values: acc.map(|a| a.value(i, s)),
            members_used: members_used.clone(),
        })
        .collect())
}

/// Statistics of a quantity at positions (`(latitude, longitude)`, degrees): each member's
/// value is its bilinear position answer ([`crate::query::position`]), then the statistics
/// are taken over the members as on grids.
pub fn ensemble_at_points(
    lc: &LoadedCycle,
    points: &[(f64, f64)],
    quantity: &Quantity,
    time_index: usize,
    statistics: &[EnsembleStatistic],
) -> Result<Vec<PointEnsemble>, EnsembleError> {
    check_request(lc, statistics)?;
    let query_error = |source| EnsembleError::Query {
        file: lc.id.clone(),
        source,
    };
    let Some(&seconds) = lc.cycle.lead_times_s.get(time_index) else {
        let times = lc.cycle.lead_times_s.len();
        return Err(query_error(QueryError::NotFound {
            field: "time_index".to_string(),
            message: format!(
                "time step {time_index} is not in cycle '{}', which has {times} time step(s)",
                lc.id
            ),
        }));
    };
    let mut member_values = vec![Vec::with_capacity(lc.cycle.members); points.len()];
    for member in 0..lc.cycle.members {
        let q = PositionQuery {
            points: points.to_vec(),
            quantities: vec![*quantity],
            times: vec![TimeSelector::LeadTime { seconds }],
            member,
            interpolation: Interpolation::Bilinear,
            allow_extrapolation: false,
        };
        let series = position(lc, &q, &Limits::default()).map_err(query_error)?;
        for (values, s) in member_values.iter_mut().zip(&series) {
            let v = s
                .samples
                .first()
                .and_then(|sample| sample.values.first())
                .copied()
                .unwrap_or(f64::NAN);
            values.push(v);
        }
    }
    Ok(points
        .iter()
        .zip(member_values)
        .map(|(&(latitude, longitude), values)| {
            let mut acc = Accumulator::new(statistics.len());
            for &v in &values {
                acc.add(v, statistics);
            }
            PointEnsemble {
                latitude,
                longitude,
                members_used: acc.n as usize,
                values: statistics
                    .iter()
                    .enumerate()
                    .map(|(i, s)| acc.value(i, s))
                    .collect(),
                member_values: values,
            }
        })
        .collect())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn accumulator_matches_hand_computed_statistics() {
        // Values 1..=4: mean 2.5, sample variance ((1.5² + 0.5²) · 2) / 3 = 5/3 (arithmetic).
        let stats = [
            EnsembleStatistic::Mean,
            EnsembleStatistic::Spread,
            EnsembleStatistic::ProbabilityBelow(3.0),
            EnsembleStatistic::ProbabilityAbove(3.0),
        ];
        let mut a = Accumulator::new(stats.len());
        for x in [1.0, 2.0, f64::NAN, 3.0, 4.0] {
            a.add(x, &stats);
        }
        assert_eq!(a.n, 4);
        assert!((a.value(0, &stats[0]) - 2.5).abs() < 1e-15);
        assert!((a.value(1, &stats[1]) - (5.0f64 / 3.0).sqrt()).abs() < 1e-15);
        // 3.0 lies on the threshold: neither below nor above.
        assert_eq!(a.value(2, &stats[2]), 0.5);
        assert_eq!(a.value(3, &stats[3]), 0.25);
        let one = {
            let mut b = Accumulator::new(1);
            b.add(7.0, &stats[1..2]);
            b
        };
        assert!(one.value(0, &stats[1]).is_nan());
        assert!(Accumulator::new(1).value(0, &stats[0]).is_nan());
    }
}
