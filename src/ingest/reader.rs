//! The reading itself: finding variables, sorting dimensions into axes, the vertical
//! coordinate, the grid, the times, and each field onto the temperature levels.

use std::collections::HashMap;
use std::path::Path;

use ndarray::Array5;
use netcdf::Variable;

use super::field::{
    self, attr_numbers, attr_text, AxisPositions, Canonical, FieldRequest, Plausible, StepwiseField,
};
use super::names::Role;
use super::units::{self, Linear, Quantity};
use super::vertical::{self, HybridTerms, Order, HYBRID_SIGMA_PRESSURE};
use super::{time, IngestConfig, IngestError};
use crate::model::{Cycle, Field4, Field5, Grid, Humidity, HumidityKind, Surface, Vertical};

/// Canonical axes, in the order of every field.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
enum Axis {
    Member = 0,
    Time = 1,
    Level = 2,
    Lat = 3,
    Lon = 4,
}

impl Axis {
    fn label(self) -> &'static str {
        match self {
            Axis::Member => "member",
            Axis::Time => "time",
            Axis::Level => "level",
            Axis::Lat => "latitude",
            Axis::Lon => "longitude",
        }
    }
}

/// One variable's dimensions sorted into canonical axes.
#[derive(Clone, Debug)]
struct Layout {
    axes: AxisPositions,
    /// Dimension name and length per canonical axis (empty name where absent).
    dims: [(String, usize); 5],
}

impl Layout {
    fn len(&self, axis: Axis) -> usize {
        self.dims.get(axis as usize).map(|d| d.1).unwrap_or(1)
    }
    fn dim(&self, axis: Axis) -> Option<&str> {
        let (name, _) = self.dims.get(axis as usize)?;
        self.axes.get(axis as usize)?.map(|_| name.as_str())
    }
}

/// The vertical coordinate as read.
#[derive(Clone, Debug)]
struct VerticalAxis {
    /// The level dimension (and coordinate variable).
    dim: String,
    /// Bottom-up.
    vertical: Vertical,
    /// Pressures of the levels, bottom-up, Pa (isobaric only).
    pressure_pa: Option<Vec<f64>>,
    top_down_in_file: bool,
    /// The surface-pressure variable named by the formula terms (hybrid only).
    ps_variable: Option<String>,
}

pub(super) struct Reader<'f> {
    file: &'f netcdf::File,
    label: String,
    config: &'f IngestConfig,
    notes: Vec<String>,
    variables: Vec<(String, String)>,
    dim_axes: HashMap<String, Option<Axis>>,
    /// When set, temperature and humidity that can be read step by step are planned here
    /// (their arrays left zero) instead of being read.
    stepwise: Option<Vec<(Bulk, StepwiseField<'f>)>>,
    /// When set, asked once the reference time and size are known, before any field is
    /// read: a reason given ends the read with [`IngestError::PassedOver`].
    pass_over: Option<&'f PassOverTest<'f>>,
}

/// Whether a file need not be read, from its cycle's reference time (RFC 3339 UTC, `None`
/// without one) and its temperature's point-levels (members × times × levels × latitudes ×
/// longitudes, as many values as the cycle's `temperature` will hold): the reason, or `None`
/// to read it.
pub type PassOverTest<'a> = dyn Fn(Option<&str>, usize) -> Option<String> + 'a;

/// The two large fields that may be read step by step.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(super) enum Bulk {
    /// The air temperature.
    Temperature,
    /// The humidity, on the temperature's own level axis.
    Humidity,
}

/// Humidity kinds in order of preference, with their roles and units.
const HUMIDITY_PREFERENCE: [(HumidityKind, Role); 4] = [
    (HumidityKind::SpecificHumidity, Role::SpecificHumidity),
    (HumidityKind::MixingRatio, Role::HumidityMixingRatio),
    (HumidityKind::DewPoint, Role::DewPointTemperature),
    (HumidityKind::RelativeHumidity, Role::RelativeHumidity),
];

// Plausibility ranges, after conversion to SI units. Temperature 150-350 K spans the coldest
// stratospheric (about 180 K) and hottest surface (about 330 K) air observed, with margin
// (common practice); humidity up to 0.1 kg/kg is above any observed tropical value (about
// 0.03) yet below what g/kg mislabelled as kg/kg gives; surface pressure 300-1100 hPa covers
// Everest (about 330 hPa) to the record high (1084 hPa, WMO archive); surface height
// -500..9000 m covers the Dead Sea shore (-430 m) to Everest (8849 m).
const TEMPERATURE_RANGE: Plausible = Plausible {
    lo: 150.0,
    hi: 350.0,
    clamp_below: 0.0,
    units: "K",
    hint: "check the units attribute (degC values labelled K fall below 150 K)",
};
const MASS_RATIO_RANGE: Plausible = Plausible {
    lo: 0.0,
    hi: 0.1,
    clamp_below: 1e-5,
    units: "kg/kg",
    hint: "check the units attribute (g/kg values labelled kg/kg exceed 0.1)",
};
const RELATIVE_HUMIDITY_RANGE: Plausible = Plausible {
    lo: 0.0,
    hi: 1.2,
    clamp_below: 1e-3,
    units: "(fraction)",
    hint: "check the units attribute (percent labelled as a fraction exceeds 1.2)",
};
const SURFACE_PRESSURE_RANGE: Plausible = Plausible {
    lo: 30_000.0,
    hi: 110_000.0,
    clamp_below: 0.0,
    units: "Pa",
    hint: "check the units attribute (hPa labelled Pa falls below 300 hPa)",
};
const SURFACE_HEIGHT_RANGE: Plausible = Plausible {
    lo: -500.0,
    hi: 9000.0,
    clamp_below: 0.0,
    units: "m",
    hint: "check the units attribute (geopotential in m2 s-2 labelled m is 9.8 times too large)",
};
// Geopotential heights of pressure or model levels: -1000 m (extrapolated below ground at
// very high pressure) to 100 km (above any level a forecast model carries).
const HEIGHT_RANGE: Plausible = Plausible {
    lo: -1000.0,
    hi: 100_000.0,
    clamp_below: 0.0,
    units: "m",
    hint: "check the units attribute (geopotential in m2 s-2 labelled m is 9.8 times too large)",
};

const LOOKED_FOR_VERTICAL: &str = "a coordinate variable on one of its dimensions with standard_name 'air_pressure' or pressure units (Pa, hPa, mbar), or with standard_name 'atmosphere_hybrid_sigma_pressure_coordinate' and formula_terms";

impl<'f> Reader<'f> {
    pub(super) fn new(file: &'f netcdf::File, label: String, config: &'f IngestConfig) -> Self {
        Reader {
            file,
            label,
            config,
            notes: Vec::new(),
            variables: Vec::new(),
            dim_axes: HashMap::new(),
            stepwise: None,
            pass_over: None,
        }
    }

    /// The same reader, asking `test` whether to go on once the cycle's reference time and
    /// size are known (metadata and coordinates read, no field yet).
    pub(super) fn passing_over(mut self, test: Option<&'f PassOverTest<'f>>) -> Self {
        self.pass_over = test;
        self
    }

    /// The same reader, planning temperature and humidity for stepwise reading where their
    /// layout allows it: [`Reader::read`] then leaves them zero, and
    /// [`Reader::take_stepwise`] hands over the plans.
    pub(super) fn stepwise(mut self) -> Self {
        self.stepwise = Some(Vec::new());
        self
    }

    /// The fields planned for stepwise reading by the last [`Reader::read`], each with its
    /// whole steps read chunk by chunk where its storage allows
    /// ([`StepwiseField::plan_chunk_reads`]; `own` is the file at `path`, opened before the
    /// library opened it).
    pub(super) fn take_stepwise(
        &mut self,
        path: &std::path::Path,
        own: Option<&std::fs::File>,
    ) -> Vec<(Bulk, StepwiseField<'f>)> {
        let mut planned = self.stepwise.take().unwrap_or_default();
        for (_, field) in planned.iter_mut() {
            field.plan_chunk_reads(path, own, &self.label);
        }
        planned
    }

    fn var(&self, name: &str) -> Option<Variable<'f>> {
        self.file.variable(name)
    }

    fn note(&mut self, text: String) {
        self.notes.push(text);
    }

    fn standard_name(var: &Variable<'_>) -> Option<String> {
        attr_text(var, "standard_name").map(|s| s.trim().to_string())
    }

    fn units_of(var: &Variable<'_>) -> String {
        attr_text(var, "units").unwrap_or_default()
    }

    /// The coordinate variable of a dimension (a 1-D variable of the same name).
    fn coordinate(&self, dim: &str) -> Option<Variable<'f>> {
        let v = self.var(dim)?;
        let dims = v.dimensions();
        (dims.len() == 1 && dims.first().map(|d| d.name()).as_deref() == Some(dim)).then_some(v)
    }

    /// What a dimension is, from its coordinate variable or its name.
    fn axis_of(&mut self, dim: &str) -> Option<Axis> {
        if let Some(a) = self.dim_axes.get(dim) {
            return *a;
        }
        let axis = self.classify(dim);
        self.dim_axes.insert(dim.to_string(), axis);
        axis
    }

    fn classify(&self, dim: &str) -> Option<Axis> {
        let member_names = self.config.names.candidates(Role::Realization);
        if let Some(c) = self.coordinate(dim) {
            let std = Self::standard_name(&c).unwrap_or_default();
            let units = Self::units_of(&c);
            let axis_attr = attr_text(&c, "axis").unwrap_or_default();
            let lower_units = units.trim().to_ascii_lowercase();
            if std == "realization" {
                return Some(Axis::Member);
            }
            if std == "air_pressure"
                || std == HYBRID_SIGMA_PRESSURE
                || (std.is_empty() && units::parse_pressure_units(&units).is_some())
            {
                return Some(Axis::Level);
            }
            if std == "latitude"
                || matches!(
                    lower_units.as_str(),
                    "degrees_north"
                        | "degree_north"
                        | "degree_n"
                        | "degrees_n"
                        | "degreen"
                        | "degreesn"
                )
            {
                return Some(Axis::Lat);
            }
            if std == "longitude"
                || matches!(
                    lower_units.as_str(),
                    "degrees_east"
                        | "degree_east"
                        | "degree_e"
                        | "degrees_e"
                        | "degreee"
                        | "degreese"
                )
            {
                return Some(Axis::Lon);
            }
            if std == "time" || axis_attr == "T" || lower_units.contains(" since ") {
                return Some(Axis::Time);
            }
            if member_names.iter().any(|n| n == dim) {
                return Some(Axis::Member);
            }
            return None;
        }
        if member_names.iter().any(|n| n == dim) {
            return Some(Axis::Member);
        }
        if dim == "time" || dim == "Time" {
            return Some(Axis::Time);
        }
        None
    }

    fn dims_of(var: &Variable<'_>) -> Vec<(String, usize)> {
        var.dimensions()
            .iter()
            .map(|d| (d.name(), d.len()))
            .collect()
    }

    fn has_level_axis(&mut self, var: &Variable<'_>) -> bool {
        Self::dims_of(var)
            .iter()
            .any(|(d, _)| self.axis_of(d) == Some(Axis::Level))
    }

    /// Sort a variable's dimensions into canonical axes.
    fn layout(&mut self, var: &Variable<'_>) -> Result<Layout, IngestError> {
        let mut axes: AxisPositions = [None; 5];
        let mut dims: [(String, usize); 5] = Default::default();
        for (pos, (name, len)) in Self::dims_of(var).into_iter().enumerate() {
            if len == 0 {
                return Err(self.layout_error(var, format!("has dimension '{name}' of length 0")));
            }
            match self.axis_of(&name) {
                Some(axis) => {
                    let i = axis as usize;
                    if axes.get(i).copied().flatten().is_some() {
                        return Err(self.layout_error(
                            var,
                            format!("has two {} dimensions (the second is '{name}')", axis.label()),
                        ));
                    }
                    if let (Some(a), Some(d)) = (axes.get_mut(i), dims.get_mut(i)) {
                        *a = Some(pos);
                        *d = (name, len);
                    }
                }
                None if len == 1 => {}
                None => {
                    return Err(self.layout_error(
                        var,
                        format!(
                            "has dimension '{name}' (length {len}) that is not a member, time, level, latitude or longitude axis: give it a coordinate variable with a standard_name"
                        ),
                    ))
                }
            }
        }
        for (axis, pos) in [(Axis::Lat, axes[3]), (Axis::Lon, axes[4])] {
            if pos.is_none() {
                return Err(self.layout_error(
                    var,
                    format!(
                        "has no {} dimension: looked for a coordinate variable with standard_name '{}' or units degrees_{}",
                        axis.label(),
                        axis.label(),
                        if axis == Axis::Lat { "north" } else { "east" }
                    ),
                ));
            }
        }
        for (i, d) in dims.iter_mut().enumerate() {
            if axes.get(i).copied().flatten().is_none() {
                *d = (String::new(), 1);
            }
        }
        Ok(Layout { axes, dims })
    }

    fn layout_error(&self, var: &Variable<'_>, detail: String) -> IngestError {
        IngestError::Layout {
            file: self.label.clone(),
            variable: var.name(),
            detail,
        }
    }

    /// Candidates for a role: by standard name (file order), then by the name map.
    fn candidates(&self, role: Role) -> Vec<Variable<'f>> {
        let mut out: Vec<Variable<'f>> = Vec::new();
        if let Some(std) = role.standard_name() {
            for v in self.file.variables() {
                if Self::standard_name(&v).as_deref() == Some(std) {
                    out.push(v);
                }
            }
        }
        for name in self.config.names.candidates(role) {
            if out.iter().any(|v| v.name() == *name) {
                continue;
            }
            if let Some(v) = self.var(name) {
                // A variable whose standard name says it is something else is not taken by name.
                match Self::standard_name(&v) {
                    Some(s) if Some(s.as_str()) != role.standard_name() && !s.is_empty() => {}
                    _ => out.push(v),
                }
            }
        }
        out
    }

    /// The first candidate on (`want_level`) or off the vertical axis, noting what was passed
    /// over.
    fn choose(&mut self, role: Role, want_level: bool) -> Option<Variable<'f>> {
        let cands = self.candidates(role);
        let mut others = Vec::new();
        let mut chosen: Option<Variable<'f>> = None;
        for v in cands {
            let on_level = self.has_level_axis(&v);
            let is_coordinate = v.dimensions().len() == 1;
            if chosen.is_none() && on_level == want_level && !is_coordinate {
                chosen = Some(v);
            } else {
                others.push(v.name());
            }
        }
        if let Some(v) = &chosen {
            if !others.is_empty() {
                let place = if want_level {
                    "on the vertical axis"
                } else {
                    "without a vertical axis"
                };
                self.note(format!(
                    "{}: chose '{}' ({place}) over {}",
                    role.key(),
                    v.name(),
                    others
                        .iter()
                        .map(|s| format!("'{s}'"))
                        .collect::<Vec<_>>()
                        .join(", ")
                ));
            }
        }
        chosen
    }

    fn units_error(&self, var: &Variable<'_>, units: &str, q: Quantity) -> IngestError {
        IngestError::Units {
            file: self.label.clone(),
            variable: var.name(),
            units: units.to_string(),
            expected: q.accepted().to_string(),
        }
    }

    fn conversion(&self, var: &Variable<'_>, q: Quantity) -> Result<Linear, IngestError> {
        let units = Self::units_of(var);
        q.parse(&units, self.config.constants.standard_gravity)
            .ok_or_else(|| self.units_error(var, &units, q))
    }

    /// Values of a 1-D or scalar variable as f64, unpacked, fill values as NaN.
    fn read_small(&self, var: &Variable<'_>) -> Result<Vec<f64>, IngestError> {
        let values = var
            .get_values::<f64, _>(..)
            .map_err(|e| IngestError::Read {
                file: self.label.clone(),
                variable: var.name(),
                detail: e.to_string().to_lowercase(),
            })?;
        let scale = attr_numbers(var, "scale_factor")
            .and_then(|v| v.first().copied())
            .unwrap_or(1.0);
        let offset = attr_numbers(var, "add_offset")
            .and_then(|v| v.first().copied())
            .unwrap_or(0.0);
        let fills: Vec<f64> = attr_numbers(var, "_FillValue")
            .into_iter()
            .chain(attr_numbers(var, "missing_value"))
            .flatten()
            .collect();
        Ok(values
            .into_iter()
            .map(|v| {
                if fills.contains(&v) {
                    f64::NAN
                } else {
                    v * scale + offset
                }
            })
            .collect())
    }

    pub(super) fn read(&mut self, path: &Path) -> Result<Cycle, IngestError> {
        let t_var = self.find_temperature()?;
        let t_layout = self.layout(&t_var)?;
        let level_dim = t_layout.dim(Axis::Level).unwrap_or_default().to_string();
        let vaxis = self.vertical_axis(&level_dim)?;
        self.variables
            .push(("vertical_coordinate".into(), vaxis.dim.clone()));

        let grid = self.grid(&t_layout)?;
        let (reference_time, lead_times_s) = self.times(&t_layout)?;
        let members = t_layout.len(Axis::Member);
        let times = t_layout.len(Axis::Time);

        let t_conv = self.conversion(&t_var, Quantity::Temperature)?;
        let target = [
            members,
            times,
            vaxis.vertical.levels(),
            grid.rows(),
            grid.cols(),
        ];
        if let Some(reason) = self
            .pass_over
            .and_then(|test| test(reference_time.as_deref(), target.iter().product()))
        {
            return Err(IngestError::PassedOver {
                file: self.label.clone(),
                reason,
            });
        }
        let t_read = FieldRead {
            var: &t_var,
            layout: &t_layout,
            vaxis: &vaxis,
            to_si: t_conv,
            check: Some(TEMPERATURE_RANGE),
        };
        let temperature = self.read_bulk_field(&t_read, target, Some(Bulk::Temperature))?;
        if temperature.data.iter().all(|v| v.is_nan()) {
            return Err(IngestError::NoValidData {
                file: self.label.clone(),
                variable: t_var.name(),
            });
        }
        self.variables
            .push(("air_temperature".into(), t_var.name()));
        let temperature = to_array5(temperature, target, &self.label, &t_var.name())?;

        let humidity = self.humidity(&vaxis, target)?;
        let surface = self.surface(&vaxis, target)?;
        let file_heights = self.file_heights(&vaxis, target)?;

        Ok(Cycle {
            source: path.to_path_buf(),
            reference_time,
            lead_times_s,
            members,
            grid,
            vertical: vaxis.vertical.clone(),
            levels_top_down_in_file: vaxis.top_down_in_file,
            temperature,
            humidity,
            surface,
            file_heights,
            constants: self.config.constants,
            variables: std::mem::take(&mut self.variables),
            notes: std::mem::take(&mut self.notes),
        })
    }

    fn find_temperature(&mut self) -> Result<Variable<'f>, IngestError> {
        let cands = self.candidates(Role::AirTemperature);
        if cands.is_empty() {
            return Err(IngestError::NoTemperature {
                file: self.label.clone(),
                looked_for: format!(
                    "standard_name 'air_temperature' or a variable named {} (add the file's name to [names] air_temperature in a dataset config)",
                    self.config
                        .names
                        .candidates(Role::AirTemperature)
                        .iter()
                        .map(|n| format!("'{n}'"))
                        .collect::<Vec<_>>()
                        .join(", ")
                ),
            });
        }
        if let Some(v) = self.choose(Role::AirTemperature, true) {
            return Ok(v);
        }
        // Report the candidate with the most dimensions: the one most likely meant as the field.
        let worst = cands
            .iter()
            .max_by_key(|v| v.dimensions().len())
            .or(cands.first());
        let (name, dims) = match worst {
            Some(v) => (
                v.name(),
                Self::dims_of(v)
                    .iter()
                    .map(|(d, _)| d.clone())
                    .collect::<Vec<_>>()
                    .join(", "),
            ),
            None => (String::new(), String::new()),
        };
        Err(IngestError::NoVerticalAxis {
            file: self.label.clone(),
            variable: name,
            looked_for: format!(
                "{LOOKED_FOR_VERTICAL}; its dimensions are ({dims}) (terrain-following or height levels are not supported)"
            ),
        })
    }

    /// Read the level coordinate of `dim`.
    fn vertical_axis(&mut self, dim: &str) -> Result<VerticalAxis, IngestError> {
        let coord = self
            .coordinate(dim)
            .ok_or_else(|| IngestError::MissingVariable {
                file: self.label.clone(),
                variable: dim.to_string(),
                needed_by: "the vertical axis".into(),
            })?;
        if Self::standard_name(&coord).as_deref() == Some(HYBRID_SIGMA_PRESSURE) {
            return self.hybrid_axis(&coord, dim);
        }
        let conv = self.conversion(&coord, Quantity::Pressure)?;
        let raw = self.read_small(&coord)?;
        let mut p: Vec<f64> = raw.iter().map(|&v| conv.apply(v)).collect();
        let order = monotonic(&self.label, &coord.name(), &p)?;
        if let Some(i) = p.iter().position(|&v| v <= 0.0) {
            return Err(IngestError::Layout {
                file: self.label.clone(),
                variable: coord.name(),
                detail: format!("has a non-positive pressure level at index {i}"),
            });
        }
        let top_down = order == Order::Increasing;
        if top_down {
            p.reverse();
            self.note(format!(
                "vertical axis '{dim}': {} isobaric levels listed top-down in the file, held bottom-up",
                p.len()
            ));
        }
        Ok(VerticalAxis {
            dim: dim.to_string(),
            vertical: Vertical::Isobaric {
                pressure_pa: p.clone(),
            },
            pressure_pa: Some(p),
            top_down_in_file: top_down,
            ps_variable: None,
        })
    }

    fn need_var(&self, name: &str, needed_by: &str) -> Result<Variable<'f>, IngestError> {
        self.var(name).ok_or_else(|| IngestError::MissingVariable {
            file: self.label.clone(),
            variable: name.to_string(),
            needed_by: needed_by.to_string(),
        })
    }

    fn formula_terms(&self, var: &Variable<'_>) -> Result<HybridTerms, IngestError> {
        let text = attr_text(var, "formula_terms").ok_or_else(|| IngestError::Attribute {
            file: self.label.clone(),
            variable: var.name(),
            attribute: "formula_terms".into(),
            detail: "is missing: a hybrid sigma-pressure coordinate needs 'ap: X b: Y ps: Z' or 'a: X b: Y p0: P ps: Z'".into(),
        })?;
        vertical::parse_formula_terms(&text)
            .as_deref()
            .and_then(HybridTerms::from_terms)
            .ok_or_else(|| IngestError::Attribute {
                file: self.label.clone(),
                variable: var.name(),
                attribute: "formula_terms".into(),
                detail: format!(
                    "is '{text}': expected 'ap: X b: Y ps: Z' or 'a: X b: Y p0: P ps: Z'"
                ),
            })
    }

    /// `p0` in Pa from the variable named by the formula terms.
    fn reference_pressure(&self, name: &str, needed_by: &str) -> Result<f64, IngestError> {
        let v = self.need_var(name, needed_by)?;
        let conv = self.conversion(&v, Quantity::Pressure)?;
        let vals = self.read_small(&v)?;
        match vals.as_slice() {
            [p0] if p0.is_finite() && *p0 > 0.0 => Ok(conv.apply(*p0)),
            _ => Err(IngestError::Layout {
                file: self.label.clone(),
                variable: name.to_string(),
                detail: "must hold one positive reference pressure".into(),
            }),
        }
    }

    /// Coefficient values (a in Pa after p0, or b) of a formula-terms variable.
    fn coefficient(
        &self,
        name: &str,
        needed_by: &str,
        pressure_factor: Option<f64>,
    ) -> Result<Vec<f64>, IngestError> {
        let v = self.need_var(name, needed_by)?;
        let vals = self.read_small(&v)?;
        if let Some(i) = vals.iter().position(|x| !x.is_finite()) {
            return Err(IngestError::Layout {
                file: self.label.clone(),
                variable: name.to_string(),
                detail: format!("has a missing coefficient at flat index {i}"),
            });
        }
        Ok(match pressure_factor {
            None => vals,
            Some(f) => vals.into_iter().map(|x| x * f).collect(),
        })
    }

    /// The factor that takes an `a`/`ap` coefficient variable to Pa: its pressure units for
    /// the `ap` form, p0 for the `a ... p0` form.
    fn a_factor(
        &self,
        terms: &HybridTerms,
        a_var: &str,
        needed_by: &str,
    ) -> Result<f64, IngestError> {
        match terms {
            HybridTerms::Ap { .. } => {
                let v = self.need_var(a_var, needed_by)?;
                let units = Self::units_of(&v);
                if units.trim().is_empty() || units.trim() == "1" {
                    // CF gives ap in pressure units; an unlabelled ap is taken as Pa.
                    Ok(1.0)
                } else {
                    units::parse_pressure_units(&units)
                        .map(|l| l.scale)
                        .ok_or_else(|| self.units_error(&v, &units, Quantity::Pressure))
                }
            }
            HybridTerms::AP0 { p0, .. } => self.reference_pressure(p0, needed_by),
        }
    }

    fn hybrid_axis(
        &mut self,
        coord: &Variable<'f>,
        dim: &str,
    ) -> Result<VerticalAxis, IngestError> {
        let cname = coord.name();
        let needed_by = format!("the formula_terms of '{cname}'");
        let terms = self.formula_terms(coord)?;
        let (a_name, b_name) = match &terms {
            HybridTerms::Ap { ap, b, .. } => (ap.clone(), b.clone()),
            HybridTerms::AP0 { a, b, .. } => (a.clone(), b.clone()),
        };
        let a_fac = self.a_factor(&terms, &a_name, &needed_by)?;
        let a_full = self.coefficient(&a_name, &needed_by, Some(a_fac))?;
        let b_full = self.coefficient(&b_name, &needed_by, None)?;
        let n = coord.len();
        if a_full.len() != n || b_full.len() != n {
            return Err(IngestError::Layout {
                file: self.label.clone(),
                variable: a_name,
                detail: format!("and '{b_name}' must have one value per level of '{cname}' ({n})"),
            });
        }
        // The level order follows the pressure at a standard surface pressure (101325 Pa,
        // ISO 2533); a hybrid coordinate is monotonic in pressure at any surface pressure.
        const P_REF: f64 = 101_325.0;
        let p_full: Vec<f64> = a_full
            .iter()
            .zip(&b_full)
            .map(|(a, b)| a + b * P_REF)
            .collect();
        let order = monotonic(&self.label, &cname, &p_full)?;
        let top_down = order == Order::Increasing;

        let (mut a_half, mut b_half) = self.half_levels(coord, &terms, n, top_down)?;
        // Bottom-up: the first half level has the highest reference pressure.
        let p_half: Vec<f64> = a_half
            .iter()
            .zip(&b_half)
            .map(|(a, b)| a + b * P_REF)
            .collect();
        if let (Some(first), Some(last)) = (p_half.first(), p_half.last()) {
            if first < last {
                a_half.reverse();
                b_half.reverse();
            }
        }
        let p_half: Vec<f64> = a_half
            .iter()
            .zip(&b_half)
            .map(|(a, b)| a + b * P_REF)
            .collect();
        monotonic(&self.label, &cname, &p_half)?;
        if let (Some(a0), Some(b0)) = (a_half.first(), b_half.first()) {
            if a0.abs() > 1e-3 || (b0 - 1.0).abs() > 1e-6 {
                self.note(format!(
                    "vertical axis '{cname}': the lowest half level has a = {a0} Pa, b = {b0} (not the surface, a = 0, b = 1)"
                ));
            }
        }
        self.note(format!(
            "vertical axis '{cname}': {n} hybrid sigma-pressure levels{}",
            if top_down {
                ", listed top-down in the file, held bottom-up"
            } else {
                ""
            }
        ));
        Ok(VerticalAxis {
            dim: dim.to_string(),
            vertical: Vertical::Hybrid {
                a_half_pa: a_half,
                b_half,
            },
            pressure_pa: None,
            top_down_in_file: top_down,
            ps_variable: Some(terms.ps().to_string()),
        })
    }

    /// Half-level a (Pa) and b, in either order (the caller puts them bottom-up).
    fn half_levels(
        &mut self,
        coord: &Variable<'f>,
        terms: &HybridTerms,
        n: usize,
        top_down: bool,
    ) -> Result<(Vec<f64>, Vec<f64>), IngestError> {
        let cname = coord.name();
        if let Some(bname) = attr_text(coord, "bounds") {
            let bvar =
                self.need_var(bname.trim(), &format!("the bounds attribute of '{cname}'"))?;
            let bterms = self.formula_terms(&bvar)?;
            let needed_by = format!("the formula_terms of '{}'", bvar.name());
            let (a_name, b_name) = match &bterms {
                HybridTerms::Ap { ap, b, .. } => (ap.clone(), b.clone()),
                HybridTerms::AP0 { a, b, .. } => (a.clone(), b.clone()),
            };
            // The a ... p0 form of the bounds may name its own p0; otherwise use the
            // coordinate's.
            let a_fac = self.a_factor(&bterms, &a_name, &needed_by)?;
            let a_b = self.coefficient(&a_name, &needed_by, Some(a_fac))?;
            let b_b = self.coefficient(&b_name, &needed_by, None)?;
            if a_b.len() != 2 * n || b_b.len() != 2 * n {
                return Err(IngestError::Layout {
                    file: self.label.clone(),
                    variable: a_name,
                    detail: format!(
                        "and '{b_name}' must have shape [{n}, 2] (bounds of the {n} levels of '{cname}')"
                    ),
                });
            }
            let mut pairs: Vec<([f64; 2], [f64; 2])> = (0..n)
                .map(|k| {
                    let a = [
                        a_b.get(2 * k).copied().unwrap_or(f64::NAN),
                        a_b.get(2 * k + 1).copied().unwrap_or(f64::NAN),
                    ];
                    let b = [
                        b_b.get(2 * k).copied().unwrap_or(f64::NAN),
                        b_b.get(2 * k + 1).copied().unwrap_or(f64::NAN),
                    ];
                    (a, b)
                })
                .collect();
            if top_down {
                pairs.reverse();
            }
            let keys: Vec<[f64; 2]> = pairs
                .iter()
                .map(|(a, b)| [a[0] + b[0] * 101_325.0, a[1] + b[1] * 101_325.0])
                .collect();
            let picks = vertical::half_levels_from_bounds(&keys, |k, c| {
                keys.get(k).and_then(|p| p.get(c)).copied().unwrap_or(f64::NAN)
            })
            .map_err(|k| IngestError::Layout {
                file: self.label.clone(),
                variable: bvar.name(),
                detail: format!(
                    "has bounds that do not meet between levels {} and {k} (bottom-up): hybrid layers must be contiguous",
                    k.saturating_sub(1)
                ),
            })?;
            let a_half = picks
                .iter()
                .map(|&i| pairs.get(i / 2).map(|p| p.0[i % 2]).unwrap_or(f64::NAN))
                .collect();
            let b_half = picks
                .iter()
                .map(|&i| pairs.get(i / 2).map(|p| p.1[i % 2]).unwrap_or(f64::NAN))
                .collect();
            self.note(format!(
                "vertical axis '{cname}': half-level coefficients from the bounds variable '{}'",
                bvar.name()
            ));
            return Ok((a_half, b_half));
        }
        let a_var = self.first_present(Role::HybridAHalfLevels, n + 1);
        let b_var = self.first_present(Role::HybridBHalfLevels, n + 1);
        match (a_var, b_var) {
            (Some(a), Some(b)) => {
                let units = Self::units_of(&a);
                let a_fac = if let Some(l) = units::parse_pressure_units(&units) {
                    l.scale
                } else {
                    match terms {
                        HybridTerms::AP0 { p0, .. } => {
                            self.reference_pressure(p0, &format!("the formula_terms of '{cname}'"))?
                        }
                        HybridTerms::Ap { .. } => 1.0,
                    }
                };
                let a_half = self.coefficient(&a.name(), "the hybrid half levels", Some(a_fac))?;
                let b_half = self.coefficient(&b.name(), "the hybrid half levels", None)?;
                self.note(format!(
                    "vertical axis '{cname}': half-level coefficients from '{}' and '{}'",
                    a.name(),
                    b.name()
                ));
                Ok((a_half, b_half))
            }
            _ => Err(IngestError::MissingHalfLevels {
                file: self.label.clone(),
                variable: cname.clone(),
                hint: format!(
                    "give '{cname}' a 'bounds' attribute naming a [{n}, 2] variable whose formula_terms name the a/ap and b bounds, or provide half-level variables ({} values) named in [names] hybrid_a_half_levels ({}) and hybrid_b_half_levels ({})",
                    n + 1,
                    self.config.names.candidates(Role::HybridAHalfLevels).join(", "),
                    self.config.names.candidates(Role::HybridBHalfLevels).join(", ")
                ),
            }),
        }
    }

    /// The first name-map variable of a role that is 1-D with `len` values.
    fn first_present(&self, role: Role, len: usize) -> Option<Variable<'f>> {
        self.config
            .names
            .candidates(role)
            .iter()
            .filter_map(|n| self.var(n))
            .find(|v| v.dimensions().len() == 1 && v.len() == len)
    }

    fn grid(&mut self, layout: &Layout) -> Result<Grid, IngestError> {
        let mut read_axis = |axis: Axis| -> Result<Vec<f64>, IngestError> {
            let dim = layout.dim(axis).unwrap_or_default().to_string();
            let coord = self
                .coordinate(&dim)
                .ok_or_else(|| IngestError::MissingVariable {
                    file: self.label.clone(),
                    variable: dim.clone(),
                    needed_by: format!("the {} axis", axis.label()),
                })?;
            let vals = self.read_small(&coord)?;
            if let Some(i) = vals.iter().position(|v| !v.is_finite()) {
                return Err(IngestError::Layout {
                    file: self.label.clone(),
                    variable: dim,
                    detail: format!("has a missing coordinate value at index {i}"),
                });
            }
            if axis == Axis::Lat {
                if let Some(i) = vals.iter().position(|v| v.abs() > 90.0) {
                    return Err(IngestError::Layout {
                        file: self.label.clone(),
                        variable: dim,
                        detail: format!(
                            "has latitude {} at index {i}, outside -90..90",
                            vals.get(i).copied().unwrap_or(f64::NAN)
                        ),
                    });
                }
            }
            self.variables.push((axis.label().to_string(), dim));
            Ok(vals)
        };
        let latitudes = read_axis(Axis::Lat)?;
        let longitudes = read_axis(Axis::Lon)?;
        Ok(Grid {
            latitudes,
            longitudes,
        })
    }

    fn times(&mut self, layout: &Layout) -> Result<(Option<String>, Vec<i64>), IngestError> {
        let steps = layout.len(Axis::Time);
        // The forecast reference time, when a variable says so.
        let mut reference: Option<i64> = None;
        let ref_var = self
            .file
            .variables()
            .find(|v| Self::standard_name(v).as_deref() == Some("forecast_reference_time"));
        if let Some(rv) = ref_var {
            let tu = self.time_units(&rv)?;
            let vals = self.read_small(&rv)?;
            let first = vals.first().copied().unwrap_or(f64::NAN);
            reference = Some(tu.instant(first).ok_or_else(|| IngestError::Layout {
                file: self.label.clone(),
                variable: rv.name(),
                detail: "has no usable value".into(),
            })?);
            if vals.len() > 1 && vals.iter().any(|v| *v != first) {
                self.note(format!(
                    "forecast_reference_time: '{}' has several values; the first is used",
                    rv.name()
                ));
            }
            self.variables
                .push(("forecast_reference_time".into(), rv.name()));
        }
        let Some(dim) = layout.dim(Axis::Time).map(str::to_string) else {
            self.note("the file has no time axis: one time step, lead time 0".into());
            return Ok((reference.map(time::format_rfc3339_utc), vec![0]));
        };
        let Some(coord) = self.coordinate(&dim) else {
            if steps == 1 {
                self.note(format!(
                    "time dimension '{dim}' has no coordinate variable: one time step, lead time 0"
                ));
                return Ok((reference.map(time::format_rfc3339_utc), vec![0]));
            }
            return Err(IngestError::MissingVariable {
                file: self.label.clone(),
                variable: dim.clone(),
                needed_by: format!("the lead times of the {steps} steps of the time dimension"),
            });
        };
        let tu = self.time_units(&coord)?;
        let vals = self.read_small(&coord)?;
        let mut instants = Vec::with_capacity(vals.len());
        for (i, v) in vals.iter().enumerate() {
            instants.push(tu.instant(*v).ok_or_else(|| IngestError::Layout {
                file: self.label.clone(),
                variable: coord.name(),
                detail: format!("has a missing or unusable time value at index {i}"),
            })?);
        }
        let reference = match reference {
            Some(r) => r,
            None => {
                self.note(format!(
                    "reference time taken from the units of '{}' (no forecast_reference_time variable)",
                    coord.name()
                ));
                tu.epoch_seconds
            }
        };
        self.variables.push(("time".into(), coord.name()));
        let leads = instants.iter().map(|t| t - reference).collect();
        Ok((Some(time::format_rfc3339_utc(reference)), leads))
    }

    fn time_units(&self, var: &Variable<'_>) -> Result<time::TimeUnits, IngestError> {
        if let Some(cal) = attr_text(var, "calendar") {
            let c = cal.trim().to_ascii_lowercase();
            if !matches!(
                c.as_str(),
                "" | "standard" | "gregorian" | "proleptic_gregorian"
            ) {
                return Err(IngestError::Attribute {
                    file: self.label.clone(),
                    variable: var.name(),
                    attribute: "calendar".into(),
                    detail: format!(
                        "is '{cal}': only the standard, gregorian and proleptic_gregorian calendars are supported"
                    ),
                });
            }
        }
        let units = Self::units_of(var);
        time::parse_time_units(&units).map_err(|e| IngestError::Attribute {
            file: self.label.clone(),
            variable: var.name(),
            attribute: "units".into(),
            detail: format!("is '{units}': {e}"),
        })
    }

    /// Read a field on the vertical axis `vaxis` (or a surface field when the variable has no
    /// level axis), checking the horizontal grid and the member/time lengths.
    fn read_field(
        &mut self,
        var: &Variable<'_>,
        layout: &Layout,
        vaxis: &VerticalAxis,
        to_si: Linear,
        check: Option<Plausible>,
    ) -> Result<Canonical, IngestError> {
        let on_temperature_axis = layout.dim(Axis::Level) == Some(vaxis.dim.as_str());
        let reverse = if on_temperature_axis {
            vaxis.top_down_in_file
        } else {
            false
        };
        let req = FieldRequest {
            file: &self.label,
            var,
            axes: layout.axes,
            reverse_levels: reverse,
            to_si,
            check,
        };
        field::read_canonical(&req)
    }

    /// [`Reader::read_field`] for temperature or humidity (`bulk`): planned for stepwise
    /// reading instead, with zero values, when the reader plans and the field's layout
    /// allows it and its shape is `target` exactly.
    fn read_bulk_field(
        &mut self,
        r: &FieldRead<'_, 'f>,
        target: [usize; 5],
        bulk: Option<Bulk>,
    ) -> Result<Canonical, IngestError> {
        if let (Some(bulk), Some(_)) = (bulk, &self.stepwise) {
            let on_temperature_axis = r.layout.dim(Axis::Level) == Some(r.vaxis.dim.as_str());
            let req = FieldRequest {
                file: &self.label,
                var: r.var,
                axes: r.layout.axes,
                reverse_levels: on_temperature_axis && r.vaxis.top_down_in_file,
                to_si: r.to_si,
                check: r.check,
            };
            if let Some(plan) = StepwiseField::plan(&req)? {
                if on_temperature_axis && plan.shape() == target {
                    let data = crate::buffers::zeroed_field(target.iter().product());
                    if let Some(planned) = self.stepwise.as_mut() {
                        planned.push((bulk, plan));
                    }
                    return Ok(Canonical {
                        shape: target,
                        data,
                    });
                }
            }
        }
        self.read_field(r.var, r.layout, r.vaxis, r.to_si, r.check)
    }

    /// Check that a field's member, time and horizontal lengths fit the temperature's.
    fn check_fit(
        &self,
        var: &Variable<'_>,
        shape: [usize; 5],
        target: [usize; 5],
    ) -> Result<(), IngestError> {
        for (i, what) in [(0usize, "members"), (1, "time steps")] {
            let (have, want) = (
                shape.get(i).copied().unwrap_or(1),
                target.get(i).copied().unwrap_or(1),
            );
            if have != want && have != 1 {
                return Err(self.layout_error(
                    var,
                    format!("has {have} {what} but the temperature has {want}"),
                ));
            }
        }
        for (i, what) in [(3usize, "latitudes"), (4, "longitudes")] {
            let (have, want) = (
                shape.get(i).copied().unwrap_or(1),
                target.get(i).copied().unwrap_or(1),
            );
            if have != want {
                return Err(self.layout_error(
                    var,
                    format!("has {have} {what} but the temperature has {want}: all fields must share one grid"),
                ));
            }
        }
        Ok(())
    }

    /// Pressures (Pa, bottom-up) of a field's own isobaric axis and whether it is top-down.
    fn own_isobaric_axis(&mut self, dim: &str) -> Result<(Vec<f64>, bool), IngestError> {
        let ax = self.vertical_axis(dim)?;
        match ax.pressure_pa {
            Some(p) => Ok((p, ax.top_down_in_file)),
            None => Err(IngestError::Layout {
                file: self.label.clone(),
                variable: dim.to_string(),
                detail: "is a hybrid axis, but the temperature is on pressure levels".into(),
            }),
        }
    }

    /// Read a 3-D field and put it on the temperature levels: straight when it shares the
    /// temperature's axis, by pressure value when it has its own isobaric axis.
    fn read_on_levels(
        &mut self,
        var: &Variable<'f>,
        vaxis: &VerticalAxis,
        (to_si, check): (Linear, Option<Plausible>),
        target: [usize; 5],
        role: &str,
        bulk: Option<Bulk>,
    ) -> Result<(Field5, Vec<usize>), IngestError> {
        let layout = self.layout(var)?;
        let dim = layout.dim(Axis::Level).unwrap_or_default().to_string();
        if dim == vaxis.dim {
            let r = FieldRead {
                var,
                layout: &layout,
                vaxis,
                to_si,
                check,
            };
            let c = self.read_bulk_field(&r, target, bulk)?;
            self.check_fit(var, c.shape, target)?;
            let arr = broadcast(c, target, &self.label, &var.name())?;
            return Ok((arr, Vec::new()));
        }
        let Some(t_p) = vaxis.pressure_pa.clone() else {
            return Err(self.layout_error(
                var,
                format!(
                    "is on level axis '{dim}', not on the temperature's hybrid axis '{}'",
                    vaxis.dim
                ),
            ));
        };
        let (own_p, own_top_down) = self.own_isobaric_axis(&dim)?;
        let own_vaxis = VerticalAxis {
            dim: dim.clone(),
            vertical: Vertical::Isobaric {
                pressure_pa: own_p.clone(),
            },
            pressure_pa: Some(own_p.clone()),
            top_down_in_file: own_top_down,
            ps_variable: None,
        };
        let c = self.read_field(var, &layout, &own_vaxis, to_si, check)?;
        let mut own_target = target;
        own_target[2] = own_p.len();
        self.check_fit(var, c.shape, own_target)?;
        let own = broadcast(c, own_target, &self.label, &var.name())?;
        let matches = vertical::match_levels_by_pressure(&t_p, &own_p);
        let [m, t, z, y, x] = target;
        let mut out = Array5::<f32>::from_elem((m, t, z, y, x), f32::NAN);
        let mut missing = Vec::new();
        for (k, src) in matches.iter().enumerate() {
            match src {
                Some(j) => out
                    .slice_mut(ndarray::s![.., .., k, .., ..])
                    .assign(&own.slice(ndarray::s![.., .., *j, .., ..])),
                None => missing.push(k),
            }
        }
        let unused = own_p.len() - matches.iter().filter(|m| m.is_some()).count();
        let hpa = |k: &usize| {
            t_p.get(*k)
                .map(|p| format!("{}", p / 100.0))
                .unwrap_or_default()
        };
        let mut note = format!(
            "{role}: '{}' is on its own level axis '{dim}' ({} levels) and was matched to the temperature levels by pressure",
            var.name(),
            own_p.len()
        );
        if !missing.is_empty() {
            note.push_str(&format!(
                "; no value at {} hPa (level {} bottom-up), left NaN",
                missing.iter().map(hpa).collect::<Vec<_>>().join(", "),
                missing
                    .iter()
                    .map(|k| k.to_string())
                    .collect::<Vec<_>>()
                    .join(", ")
            ));
        }
        if unused > 0 {
            note.push_str(&format!(
                "; {unused} of its levels are not temperature levels and were dropped"
            ));
        }
        self.note(note);
        Ok((out, missing))
    }

    fn humidity(
        &mut self,
        vaxis: &VerticalAxis,
        target: [usize; 5],
    ) -> Result<Option<Humidity>, IngestError> {
        let mut passed_over: Vec<String> = Vec::new();
        for (kind, role) in HUMIDITY_PREFERENCE {
            let Some(var) = self.choose(role, true) else {
                for v in self.candidates(role) {
                    passed_over.push(format!(
                        "'{}' ({}, not on a vertical axis)",
                        v.name(),
                        role.key()
                    ));
                }
                continue;
            };
            let (quantity, check) = match kind {
                HumidityKind::SpecificHumidity | HumidityKind::MixingRatio => {
                    (Quantity::MassRatio, MASS_RATIO_RANGE)
                }
                HumidityKind::DewPoint => (Quantity::Temperature, TEMPERATURE_RANGE),
                HumidityKind::RelativeHumidity => {
                    (Quantity::RelativeHumidity, RELATIVE_HUMIDITY_RANGE)
                }
            };
            let conv = self.conversion(&var, quantity)?;
            let (values, missing_levels) = self.read_on_levels(
                &var,
                vaxis,
                (conv, Some(check)),
                target,
                role.key(),
                Some(Bulk::Humidity),
            )?;
            if values.iter().all(|v| v.is_nan()) {
                return Err(IngestError::NoValidData {
                    file: self.label.clone(),
                    variable: var.name(),
                });
            }
            self.variables.push((role.key().to_string(), var.name()));
            let mut note = format!("humidity: using '{}' ({})", var.name(), role.key());
            if !passed_over.is_empty() {
                note.push_str(&format!("; passed over {}", passed_over.join(", ")));
            }
            if kind == HumidityKind::RelativeHumidity {
                note.push_str(&format!(
                    "; relative humidity taken with respect to {}",
                    match self.config.rh_phase {
                        crate::physics::humidity::RelativeHumidityPhase::Water =>
                            "water (WMO convention)",
                        crate::physics::humidity::RelativeHumidityPhase::IceBelowFreezing =>
                            "ice below 0 degC and water above",
                    }
                ));
            }
            self.note(note);
            return Ok(Some(Humidity {
                kind,
                values,
                missing_levels,
            }));
        }
        let mut note =
            "humidity: none found on the vertical axis; heights will use dry air".to_string();
        if !passed_over.is_empty() {
            note.push_str(&format!(" (passed over {})", passed_over.join(", ")));
        }
        self.note(note);
        Ok(None)
    }

    fn read_surface_field(
        &mut self,
        var: &Variable<'_>,
        vaxis: &VerticalAxis,
        q: Quantity,
        check: Plausible,
        target: [usize; 5],
    ) -> Result<Field4, IngestError> {
        let layout = self.layout(var)?;
        if layout.dim(Axis::Level).is_some() {
            return Err(self.layout_error(var, "is a surface field but has a level axis".into()));
        }
        let conv = self.conversion(var, q)?;
        let c = self.read_field(var, &layout, vaxis, conv, Some(check))?;
        let mut t2 = target;
        t2[2] = 1;
        self.check_fit(var, c.shape, t2)?;
        let arr = broadcast(c, t2, &self.label, &var.name())?;
        let [m, t, _, y, x] = t2;
        arr.into_shape_with_order((m, t, y, x))
            .map_err(|e| IngestError::Layout {
                file: self.label.clone(),
                variable: var.name(),
                detail: format!("cannot be arranged as a surface field: {e}"),
            })
    }

    fn surface(
        &mut self,
        vaxis: &VerticalAxis,
        target: [usize; 5],
    ) -> Result<Option<Surface>, IngestError> {
        let ps_var = match &vaxis.ps_variable {
            Some(name) => {
                Some(self.need_var(name, &format!("the formula_terms of '{}'", vaxis.dim))?)
            }
            None => self.choose(Role::SurfaceAirPressure, false),
        };
        let height_var = match self.choose(Role::SurfaceGeopotential, false) {
            Some(v) => Some((v, Role::SurfaceGeopotential)),
            None => self
                .choose(Role::SurfaceAltitude, false)
                .map(|v| (v, Role::SurfaceAltitude)),
        };
        let is_hybrid = vaxis.ps_variable.is_some();
        match (ps_var, height_var) {
            (Some(p), Some((h, role))) => {
                let pressure_pa = self.read_surface_field(
                    &p,
                    vaxis,
                    Quantity::Pressure,
                    SURFACE_PRESSURE_RANGE,
                    target,
                )?;
                let height_m = self.read_surface_field(
                    &h,
                    vaxis,
                    Quantity::Height,
                    SURFACE_HEIGHT_RANGE,
                    target,
                )?;
                self.variables
                    .push(("surface_air_pressure".into(), p.name()));
                self.variables.push((role.key().to_string(), h.name()));
                if role == Role::SurfaceAltitude {
                    self.note(format!(
                        "surface height: '{}' (surface_altitude) taken as geopotential height (they differ by less than 0.1 %)",
                        h.name()
                    ));
                }
                Ok(Some(Surface {
                    pressure_pa,
                    height_m,
                }))
            }
            (None, _) if is_hybrid => Err(IngestError::MissingVariable {
                file: self.label.clone(),
                variable: vaxis.ps_variable.clone().unwrap_or_default(),
                needed_by: format!("the formula_terms of '{}'", vaxis.dim),
            }),
            (Some(_), None) if is_hybrid => Err(IngestError::MissingField {
                file: self.label.clone(),
                what: "surface_geopotential or surface_altitude variable".into(),
                needed_by: format!(
                    "the hybrid levels of '{}' (their heights integrate upward from the surface)",
                    vaxis.dim
                ),
            }),
            (p, h) => {
                let what = match (p.is_some(), h.is_some()) {
                    (true, false) => "surface pressure but no surface geopotential or altitude",
                    (false, true) => "surface height but no surface pressure",
                    _ => "no surface pressure or surface height",
                };
                self.note(format!(
                    "surface: the file has {what}; levels below the ground cannot be marked"
                ));
                Ok(None)
            }
        }
    }

    fn file_heights(
        &mut self,
        vaxis: &VerticalAxis,
        target: [usize; 5],
    ) -> Result<Option<Field5>, IngestError> {
        let found = match self.choose(Role::GeopotentialHeight, true) {
            Some(v) => Some((v, Role::GeopotentialHeight)),
            None => self
                .choose(Role::Geopotential, true)
                .map(|v| (v, Role::Geopotential)),
        };
        let Some((var, role)) = found else {
            return Ok(None);
        };
        let conv = self.conversion(&var, Quantity::Height)?;
        let (values, _) = self.read_on_levels(
            &var,
            vaxis,
            (conv, Some(HEIGHT_RANGE)),
            target,
            role.key(),
            None,
        )?;
        self.variables.push((role.key().to_string(), var.name()));
        Ok(Some(values))
    }
}

/// The arguments of one field read.
struct FieldRead<'r, 'f> {
    var: &'r Variable<'f>,
    layout: &'r Layout,
    vaxis: &'r VerticalAxis,
    to_si: Linear,
    check: Option<Plausible>,
}

/// Check strict monotonicity of level values (already in Pa) and name the variable if not.
fn monotonic(file: &str, variable: &str, values: &[f64]) -> Result<Order, IngestError> {
    vertical::monotonic_order(values).map_err(|i| {
        let around: Vec<String> = values
            .iter()
            .skip(i.saturating_sub(1))
            .take(3)
            .map(|v| format!("{v}"))
            .collect();
        IngestError::NonMonotonic {
            file: file.to_string(),
            variable: variable.to_string(),
            index: i,
            detail: format!("values near it: {} Pa", around.join(", ")),
        }
    })
}

fn to_array5(
    c: Canonical,
    target: [usize; 5],
    file: &str,
    var: &str,
) -> Result<Field5, IngestError> {
    let [m, t, z, y, x] = c.shape;
    if c.shape != target {
        return Err(IngestError::Layout {
            file: file.to_string(),
            variable: var.to_string(),
            detail: format!("has shape {:?} where {:?} was expected", c.shape, target),
        });
    }
    Array5::from_shape_vec((m, t, z, y, x), c.data).map_err(|e| IngestError::Layout {
        file: file.to_string(),
        variable: var.to_string(),
        detail: format!("cannot be arranged: {e}"),
    })
}

/// Broadcast a field with one member or one time step to the target, or take it as is.
fn broadcast(
    c: Canonical,
    target: [usize; 5],
    file: &str,
    var: &str,
) -> Result<Field5, IngestError> {
    if c.shape == target {
        return to_array5(c, target, file, var);
    }
    let shape = c.shape;
    let arr = to_array5(c, shape, file, var)?;
    let [m, t, z, y, x] = target;
    let view = arr
        .broadcast((m, t, z, y, x))
        .ok_or_else(|| IngestError::Layout {
            file: file.to_string(),
            variable: var.to_string(),
            detail: format!("of shape {shape:?} cannot be broadcast to {target:?}"),
        })?;
    Ok(view.to_owned())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn broadcast_repeats_single_member_and_time() {
        let c = Canonical {
            shape: [1, 1, 1, 1, 2],
            data: vec![1.0, 2.0],
        };
        let b = broadcast(c, [2, 3, 1, 1, 2], "f.nc", "v");
        let b = match b {
            Ok(b) => b,
            Err(e) => panic!("{e}"),
        };
        assert_eq!(b.shape(), &[2, 3, 1, 1, 2]);
        assert!(b.iter().step_by(2).all(|&v| v == 1.0));
        let c = Canonical {
            shape: [2, 1, 1, 1, 2],
            data: vec![1.0, 2.0, 3.0, 4.0],
        };
        let e = broadcast(c, [3, 1, 1, 1, 2], "f.nc", "v");
        let msg = e.map(|_| String::new()).unwrap_or_else(|e| e.to_string());
        assert!(msg.contains("'v'") && msg.contains("f.nc"), "{msg}");
    }
}
