//! Reading one measurement line of a family run into its readings: a one-pass reader
//! for the usual line that builds no tree, and the tree reader that names every fault.

use super::LocalRun;
use crate::problem::Problem;
use crate::request::envelope;
use crate::request::line_scan::Scan;
use serde_json::{Map, Value};

impl LocalRun {
    /// The usual line `{"t": seconds, "values": {"sensor": [numbers], ...}}` read in one
    /// pass into `self.readings`, building no tree and allocating nothing: its time, or
    /// `None` (the readings cleared) on anything else, when [`Self::read_tree`] reads it
    /// again and names any fault. Sensors in the order written, as the tree keeps them.
    pub(super) fn scan_line(&mut self, line: &str) -> Option<f64> {
        let t = self.scan(line);
        if t.is_none() {
            self.readings.clear();
        }
        t
    }

    fn scan(&mut self, line: &str) -> Option<f64> {
        let mut s = Scan::new(line);
        self.seen.fill(false);
        let (mut t, mut values) = (None, false);
        s.eat(b'{')?;
        if !s.eat_if(b'}') {
            loop {
                match s.key()? {
                    "t" if t.is_none() => {
                        s.eat(b':')?;
                        t = Some(s.number()?);
                    }
                    "values" if !values => {
                        s.eat(b':')?;
                        values = true;
                        self.scan_values(&mut s)?;
                    }
                    _ => return None,
                }
                if !s.eat_if(b',') {
                    s.eat(b'}')?;
                    break;
                }
            }
        }
        s.end()?;
        t
    }

    /// `{"sensor": [one number per element read], ...}` at the cursor.
    fn scan_values(&mut self, s: &mut Scan<'_>) -> Option<()> {
        s.eat(b'{')?;
        if s.eat_if(b'}') {
            return Some(());
        }
        loop {
            let k = self.fm.sensor_index(s.key()?)?;
            s.eat(b':')?;
            if std::mem::replace(&mut self.seen[k], true) {
                return None;
            }
            let sensor = &self.fm.sensors[k];
            let start = self.fm.set.starts[sensor.family];
            s.eat(b'[')?;
            for (i, &e) in sensor.elements.iter().enumerate() {
                if i > 0 {
                    s.eat(b',')?;
                }
                let z = s.number()?;
                self.readings.push(e, start + e, z, sensor.std);
            }
            s.eat(b']')?;
            if !s.eat_if(b',') {
                return s.eat(b'}');
            }
        }
    }

    /// The line read as a JSON tree, every fault named at its pointer: its time, with its
    /// readings in `self.readings`.
    pub(super) fn read_tree(&mut self, line: &[u8], at: &str) -> Result<f64, Problem> {
        let v: Value = serde_json::from_slice(line).map_err(envelope::json_problem)?;
        let t = match v.get("t").and_then(Value::as_f64) {
            Some(t) if t.is_finite() => t,
            _ => {
                return Err(Problem::field(
                    format!("{at}/t"),
                    "expected the line's time as a number of seconds",
                ))
            }
        };
        if let Some(values) = v.get("values") {
            let Some(values) = values.as_object() else {
                return Err(Problem::field(
                    format!("{at}/values"),
                    "expected an object of sensor readings",
                ));
            };
            self.gather(values, at)?;
        }
        Ok(t)
    }

    /// The line's readings into `self.readings`, each value at its element.
    fn gather(&mut self, values: &Map<String, Value>, at: &str) -> Result<(), Problem> {
        for (name, x) in values {
            let p = format!("{at}/values/{name}");
            let Some(k) = self.fm.sensor_index(name) else {
                return Err(Problem::field(
                    p,
                    format!("'{name}' is not a sensor of this model"),
                ));
            };
            let s = &self.fm.sensors[k];
            let list = x.as_array().filter(|a| a.len() == s.elements.len());
            let Some(list) = list else {
                return Err(Problem::field(
                    p,
                    format!(
                        "expected an array of {} values, one per element read, in index order",
                        s.elements.len()
                    ),
                ));
            };
            let start = self.fm.set.starts[s.family];
            for (i, (z, &e)) in list.iter().zip(&s.elements).enumerate() {
                match z.as_f64() {
                    Some(z) if z.is_finite() => self.readings.push(e, start + e, z, s.std),
                    _ => {
                        return Err(Problem::field(
                            format!("{p}/{i}"),
                            "expected a finite number",
                        ))
                    }
                }
            }
        }
        Ok(())
    }
}
