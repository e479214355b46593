//! How a filter run's failure reads in an answer: [`RunError`] (the filter layer's own
//! error) becomes the RFC 9457 problem document the web layer and the CLI send.
//!
//! Faults in the request (a time going backwards, off the model's grid, unusable unscented
//! settings, a prior the ensemble cannot be drawn from) are 422s pointing at the field;
//! a step that stops on a numerical failure is `numerical-failure`; one that runs out of
//! the compute budget is `deadline-exceeded`. The detail is the error's own message, with
//! a sensor the filter knows only by its index named as the model names it
//! ([`step_problem`]).

use crate::filter::run::RunError;
use crate::filter::FilterError;
use crate::model::Model;
use crate::problem::{Problem, ProblemKind};

/// [`Problem::from`] a run's error, with a failing sensor named: 'a non-finite value
/// appeared in the Jacobian of sensor "encoder"' instead of its index in the model.
pub(super) fn step_problem(e: RunError, model: &Model) -> Problem {
    let renamed = match &e {
        RunError::Step {
            cause: cause @ FilterError::SensorNonFinite { sensor, what },
            ..
        } => model.sensors.get(*sensor).map(|s| {
            (
                cause.to_string(),
                format!(
                    "a non-finite value appeared in the {what} of sensor \"{}\"",
                    s.name
                ),
            )
        }),
        RunError::Step {
            cause: cause @ FilterError::RateNonFinite { state },
            ..
        } => model.states.get(*state).map(|name| {
            (
                cause.to_string(),
                format!("a non-finite value appeared in the rate formula of state \"{name}\" during integration"),
            )
        }),
        RunError::Step {
            cause: FilterError::LostPrecision { state, .. },
            ..
        } => model.states.get(*state).map(|name| (format!("state #{state} "), format!("state \"{name}\" "))),
        _ => None,
    };
    let mut p = Problem::from(e);
    if let Some((by_index, by_name)) = renamed {
        p.detail = p.detail.replace(&by_index, &by_name);
    }
    p
}

impl From<RunError> for Problem {
    fn from(e: RunError) -> Self {
        let detail = e.to_string();
        match e {
            RunError::Unscented(_) => Problem::field("/filter/unscented", detail),
            RunError::Ensemble(_) => Problem::field("/prior", detail),
            RunError::TimeDecreasing { pointer, .. }
            | RunError::OffGrid { pointer, .. }
            | RunError::GapTooLong { pointer, .. } => {
                Problem::field(format!("{pointer}/t"), detail)
            }
            RunError::TooManySteps { pointer, .. } => Problem::field(pointer, detail),
            RunError::Step {
                cause: FilterError::Deadline,
                ..
            } => Problem::new(ProblemKind::DeadlineExceeded, detail),
            RunError::Step { .. } => Problem::new(ProblemKind::NumericalFailure, detail),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn request_faults_are_422s_at_the_field_and_step_failures_are_not() {
        // The contract (openapi/openapi.yaml): times going backwards are a 422 with a
        // JSON Pointer (RFC 6901) to the field; RFC 9457 carries the pointer in `errors`.
        let p = Problem::from(RunError::TimeDecreasing {
            pointer: "/measurements/3".into(),
            at: "2.5".into(),
            current: "4".into(),
            back: 1.5,
        });
        assert_eq!(p.status, 422);
        assert_eq!(p.errors[0].pointer, "/measurements/3/t");
        assert_eq!(
            p.errors[0].detail,
            "times must not decrease: this line's time 2.5 is 1.5 s before 4, the last time the run reached; send lines in time order, or set filter.late to \"skip\" to skip late lines with a warning"
        );
        let p = Problem::from(RunError::Ensemble(FilterError::NotPositive(
            "prior covariance",
        )));
        assert_eq!((p.status, p.errors[0].pointer.as_str()), (422, "/prior"));
        let step = |cause| RunError::Step {
            line: 7,
            at: "0.25".into(),
            cause,
        };
        let p = Problem::from(step(FilterError::NonFinite("state")));
        assert!(p.type_uri.ends_with("/numerical-failure") && p.errors.is_empty());
        assert_eq!(
            p.detail,
            "the filter stopped at step 7 (t = 0.25): a non-finite value appeared in the state"
        );
        // A sensor's failure names the sensor as the model does.
        let model = crate::request::validate::model(
            &serde_json::json!({"states": ["pos", "vel"],
                "dynamics": {"rates": {"pos": "vel", "vel": "0"}},
                "sensors": {"encoder": {"measures": "pos", "std": 0.01},
                            "tachometer": {"measures": "vel", "std": 0.1}}}),
            "/model",
            &crate::config::Limits::default(),
        )
        .unwrap();
        let cause = FilterError::SensorNonFinite {
            sensor: 1,
            what: "Jacobian",
        };
        let p = step_problem(step(cause), &model);
        assert!(p.type_uri.ends_with("/numerical-failure"));
        assert_eq!(
            p.detail,
            "the filter stopped at step 7 (t = 0.25): a non-finite value appeared in the \
             Jacobian of sensor \"tachometer\""
        );
        let p = Problem::from(step(FilterError::Deadline));
        assert!(p.type_uri.ends_with("/deadline-exceeded"), "{}", p.type_uri);
        assert_eq!(p.status, ProblemKind::DeadlineExceeded.status_title().0);
    }
}
