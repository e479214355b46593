//! `POST /v1/estimate/stream`: the header line sets the run up, then each measurement
//! line becomes one estimate line and the end one `{posterior, summary}` line. Memory does
//! not grow with the number of lines.

use super::plain::{line_problem, stats};
use super::setup::{setup, Setup};
use crate::config::Limits;
use crate::filter::run::Run;
use crate::job::write::Writer;
use crate::job::RunStats;
use crate::model::{Reading, Zone};
use crate::problem::{Problem, ProblemKind};
use crate::request::envelope;
use crate::request::reading::ReadingParser;

/// A stream in progress (see [`crate::job::StreamSession`]).
pub(super) struct Stream {
    run: Run,
    writer: Writer,
    reading: Reading,
    lines: u64,
    /// Where offset-less timestamps are read (the header's `time_zone`).
    zone: Zone,
}

impl Stream {
    /// Parse the header line `{model, filter, prior, output?}`.
    pub(super) fn start(header: &[u8], limits: &Limits) -> Result<Self, Problem> {
        let env = envelope::envelope(header)?;
        if env.measurements.is_some() {
            return Err(Problem::field("/measurements", "the stream's first line holds model, filter, prior and output; readings follow one per line"));
        }
        let Setup {
            model,
            cfg,
            prior,
            output,
            zone,
        } = setup(&env, limits)?;
        if !output.at.is_empty() {
            return Err(Problem::field(
                "/output/at",
                "prediction-only times are available on /v1/estimate, not on the stream",
            ));
        }
        let writer = Writer::new(&model, prior.mode, output);
        let run = Run::new(model, cfg, prior, false)?;
        Ok(Self {
            run,
            writer,
            reading: Reading::default(),
            lines: 0,
            zone,
        })
    }

    /// One measurement line → one estimate line.
    pub(super) fn push(
        &mut self,
        line: &[u8],
        line_no: u64,
        out: &mut Vec<u8>,
    ) -> Result<(), Problem> {
        let text = std::str::from_utf8(line).map_err(|_| {
            Problem::new(
                ProblemKind::MalformedJson,
                format!("line {line_no} is not UTF-8"),
            )
        })?;
        let model = self.run.model();
        let parser = ReadingParser::new(model, self.run.mode(), &self.zone);
        parser.parse(text, &mut self.reading).map_err(|e| {
            let mut p = line_problem(e);
            p.detail = format!("line {line_no}: {}", p.detail);
            p
        })?;
        self.run.step(&self.reading, "").map_err(|e| {
            let mut p = Problem::from(e);
            p.detail = format!("line {line_no}: {}", p.detail);
            p
        })?;
        self.lines += 1;
        let est = self.run.estimator();
        self.writer.estimate(
            out,
            &self.reading.t,
            est.mean(),
            est.covariance(),
            Some(est.obs()).filter(|_| !self.reading.sensors.is_empty()),
        );
        out.push(b'\n');
        Ok(())
    }

    /// The last line `{posterior, summary}`.
    pub(super) fn finish(self, out: &mut Vec<u8>) -> RunStats {
        out.push(b'{');
        let est = self.run.estimator();
        self.writer.posterior(
            out,
            &self.run.time(),
            est.mean(),
            est.covariance(),
            est.members(),
            est.step(),
            self.run.inputs(),
        );
        out.push(b',');
        self.writer
            .summary(out, &self.run.counts, &self.run.final_warnings());
        out.extend_from_slice(b"}\n");
        stats(&self.run)
    }
}
