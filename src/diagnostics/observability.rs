//! Which states the sensors can recover: the rank of the observability matrix of the model
//! linearised at a point, O = [H; H F; H F²; …; H F^{n−1}] (Kalman 1960; for the local,
//! linearised test see e.g. Simon 2006, *Optimal State Estimation*, §1.7), for all sensors
//! together and for each alone. State i is unrecoverable when the unit vector eᵢ has a
//! component in the null space of O (it is not in O's row space).
//! F is ∂f/∂x for rates and A for linear continuous models, ∂g/∂x or F for discrete ones.

use crate::config::Limits;
use crate::job::{Done, RunStats};
use crate::problem::Problem;
use crate::spec::model::{Dynamics, Model};
use crate::spec::request;
use crate::spec::validate;
use nalgebra::{DMatrix, DVector};
use serde::Serialize;

/// Rank and unrecoverable states for one set of sensors.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct Observability {
    /// Rank of the observability matrix.
    pub rank: usize,
    /// Number of states.
    pub dimension: usize,
    /// States the sensors cannot recover.
    pub unobservable: Vec<String>,
}

/// Dynamics Jacobian (n × n) and each sensor's Jacobian at `x`, inputs `u`, time `t`.
pub fn jacobians(
    model: &Model,
    x: &DVector<f64>,
    u: &DVector<f64>,
    t: f64,
) -> (DMatrix<f64>, Vec<DMatrix<f64>>) {
    let (n, nu) = (model.n(), model.nu());
    let mut vars = vec![0.0; model.slot_count()];
    vars[..n].copy_from_slice(x.as_slice());
    vars[n..n + nu].copy_from_slice(u.as_slice());
    vars[n + nu] = t;
    vars[n + nu + 1] = 1.0;
    let mut f = DMatrix::zeros(n, n);
    match &model.dynamics {
        Dynamics::Linear { matrix, .. } => f.copy_from(matrix),
        Dynamics::Rates(p) | Dynamics::Next(p) => {
            let mut ws = p.workspace();
            let mut out = vec![0.0; p.outputs()];
            let mut jac = vec![0.0; p.outputs() * n];
            p.eval_jacobian(&vars[..p.slots()], n, &mut ws, &mut out, &mut jac);
            for k in 0..p.outputs() {
                for j in 0..n {
                    f[(k, j)] = jac[k * n + j];
                }
            }
            if matches!(model.dynamics, Dynamics::Next(_)) {
                for k in model.n_model..n {
                    f[(k, k)] = 1.0;
                }
            }
        }
    }
    let hs = model
        .sensors
        .iter()
        .map(|s| {
            let mut ws = s.program.workspace();
            let mut out = vec![0.0; s.dim];
            let mut jac = vec![0.0; s.dim * n];
            s.program
                .eval_jacobian(&vars[..s.program.slots()], n, &mut ws, &mut out, &mut jac);
            DMatrix::from_row_slice(s.dim, n, &jac)
        })
        .collect();
    (f, hs)
}

/// Observability of the pair (F, H) over the named states.
pub fn analyse(f: &DMatrix<f64>, h: &DMatrix<f64>, states: &[String]) -> Observability {
    let n = f.nrows();
    let m = h.nrows();
    let mut o = DMatrix::zeros(m * n, n);
    let mut block = h.clone();
    for k in 0..n {
        o.view_mut((k * m, 0), (m, n)).copy_from(&block);
        block = &block * f;
    }
    // Scale each block row to unit size so that powers of F with large entries do not hide
    // the other rows from the rank tolerance.
    for mut row in o.row_iter_mut() {
        let norm = row.norm();
        if norm > 0.0 {
            row /= norm;
        }
    }
    let svd = o.svd(false, true);
    let smax = svd.singular_values.iter().cloned().fold(0.0, f64::max);
    let tol = smax * 1e-9 * (n as f64);
    let rank = svd.singular_values.iter().filter(|s| **s > tol).count();
    let vt = svd.v_t.expect("requested V");
    // Rows of Vᵀ with singular value ≤ tol span the null space (SVD lists values sorted).
    let mut unobservable = Vec::new();
    for (i, name) in states.iter().enumerate() {
        let mut weight = 0.0;
        for (r, s) in svd.singular_values.iter().enumerate() {
            if *s <= tol {
                weight += vt[(r, i)] * vt[(r, i)];
            }
        }
        // Rows beyond the number of singular values (when m·n < n) are null directions too.
        if vt.nrows() < n {
            weight += 0.0;
        }
        if weight > 1e-8 {
            unobservable.push(name.clone());
        }
    }
    Observability {
        rank,
        dimension: n,
        unobservable,
    }
}

#[derive(Serialize)]
struct CheckResponse {
    states: Vec<String>,
    inputs: Vec<String>,
    sensors: Vec<SensorInfo>,
    dimensions: Dimensions,
    observability: Full,
    warnings: Vec<String>,
}

#[derive(Serialize)]
struct SensorInfo {
    name: String,
    dimension: usize,
}

#[derive(Serialize)]
struct Dimensions {
    states: usize,
    inputs: usize,
    readings: usize,
}

#[derive(Serialize)]
struct Full {
    rank: usize,
    dimension: usize,
    unobservable: Vec<String>,
    at: std::collections::BTreeMap<String, f64>,
    by_sensor: indexmap_like::Ordered,
}

mod indexmap_like {
    use super::Observability;
    use serde::ser::SerializeMap;
    use serde::{Serialize, Serializer};

    /// Sensor name → observability, serialised in model order.
    pub struct Ordered(pub Vec<(String, Observability)>);

    impl Serialize for Ordered {
        fn serialize<S: Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
            let mut m = s.serialize_map(Some(self.0.len()))?;
            for (k, v) in &self.0 {
                m.serialize_entry(
                    k,
                    &SensorObs {
                        rank: v.rank,
                        unobservable: &v.unobservable,
                    },
                )?;
            }
            m.end()
        }
    }

    #[derive(Serialize)]
    struct SensorObs<'a> {
        rank: usize,
        unobservable: &'a [String],
    }
}

/// `POST /v1/check`.
pub fn check_request(body: &[u8], limits: &Limits) -> Result<Done, Problem> {
    let env = request::envelope(body)?;
    let model_v = request::section(env.model, "model")?;
    let model = validate::model(&model_v, "/model", limits).map_err(Problem::invalid)?;
    let (x, u, t) = match request::optional_section(env.prior)? {
        Some(pv) => {
            let p = validate::prior(&pv, "/prior", &model, None).map_err(Problem::invalid)?;
            (p.mean, p.inputs, p.t.secs)
        }
        None => {
            let mut x = DVector::zeros(model.n());
            for (k, p) in model.estimated.iter().enumerate() {
                x[model.n_model + k] = p.initial;
            }
            (x, DVector::zeros(model.nu()), 0.0)
        }
    };
    let (f, hs) = jacobians(&model, &x, &u, t);
    let mut warnings = Vec::new();
    if !f
        .iter()
        .chain(hs.iter().flat_map(|h| h.iter()))
        .all(|v| v.is_finite())
    {
        warnings.push("some derivatives are not finite at the linearisation point; give a prior mean where the formulas are smooth".to_string());
    }
    let mut stacked = DMatrix::zeros(hs.iter().map(|h| h.nrows()).sum(), model.n());
    let mut row = 0;
    for h in &hs {
        stacked
            .view_mut((row, 0), (h.nrows(), model.n()))
            .copy_from(h);
        row += h.nrows();
    }
    let all = analyse(&f, &stacked, &model.states);
    let by_sensor: Vec<(String, Observability)> = model
        .sensors
        .iter()
        .zip(&hs)
        .map(|(s, h)| (s.name.clone(), analyse(&f, h, &model.states)))
        .collect();
    for name in &all.unobservable {
        warnings.push(format!("state '{name}' cannot be recovered from these sensors near this point: its estimate will follow the prior and the model only"));
    }
    for (s, h) in model.sensors.iter().zip(&hs) {
        if h.iter().all(|v| *v == 0.0) {
            warnings.push(format!(
                "sensor '{}' does not depend on any state at this point",
                s.name
            ));
        }
    }
    for (i, name) in model.inputs.iter().enumerate() {
        let slot = model.n() + i;
        let used = match &model.dynamics {
            Dynamics::Linear { b, .. } => b.column(i).iter().any(|v| *v != 0.0),
            Dynamics::Rates(p) | Dynamics::Next(p) => {
                (0..p.outputs()).any(|k| p.depends_on(k, slot))
            }
        } || model
            .sensors
            .iter()
            .any(|s| (0..s.dim).any(|k| s.program.depends_on(k, slot)));
        if !used {
            warnings.push(format!(
                "input '{name}' is not used by the dynamics or any sensor"
            ));
        }
    }
    let resp = CheckResponse {
        states: model.states.clone(),
        inputs: model.inputs.clone(),
        sensors: model
            .sensors
            .iter()
            .map(|s| SensorInfo {
                name: s.name.clone(),
                dimension: s.dim,
            })
            .collect(),
        dimensions: Dimensions {
            states: model.n(),
            inputs: model.nu(),
            readings: model.sensors.iter().map(|s| s.dim).sum(),
        },
        observability: Full {
            rank: all.rank,
            dimension: all.dimension,
            unobservable: all.unobservable,
            at: model
                .states
                .iter()
                .cloned()
                .zip(x.iter().copied())
                .collect(),
            by_sensor: indexmap_like::Ordered(by_sensor),
        },
        warnings,
    };
    let body = serde_json::to_vec(&resp)
        .map_err(|e| Problem::new(crate::problem::ProblemKind::Internal, e.to_string()))?;
    Ok(Done {
        body,
        stats: RunStats::default(),
    })
}
