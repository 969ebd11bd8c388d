//! A family's options as written in its `[model]` section, before checking. A family's builder
//! takes the keys it knows with the typed getters below (each checks type and range and says
//! what is wrong); whatever is left afterwards is refused by the caller as "not an option of
//! family X". So an unchecked option can only become part of a family through its builder.

use toml::Value;

/// An option that is missing, of the wrong type or out of range: the key and what is wrong.
/// The scenario planner adds the file and the line.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("key `model.{key}`: {message}")]
pub struct OptionError {
    /// The option's key within `[model]`.
    pub key: String,
    /// What is wrong, and how to fix it.
    pub message: String,
}

/// The options of one `[model]` section still to be taken by a family builder.
#[derive(Debug, Clone, Default)]
pub struct Options {
    family: String,
    entries: Vec<(String, Value)>,
}

fn type_name(v: &Value) -> &'static str {
    match v {
        Value::String(_) => "a string",
        Value::Integer(_) => "an integer",
        Value::Float(_) => "a number",
        Value::Boolean(_) => "true or false",
        Value::Datetime(_) => "a date",
        Value::Array(_) => "a list",
        Value::Table(_) => "a table",
    }
}

impl Options {
    /// Options of family `family`, in the order written.
    pub fn new(family: &str, entries: Vec<(String, Value)>) -> Options {
        Options {
            family: family.to_string(),
            entries,
        }
    }

    /// The family these options belong to.
    pub fn family(&self) -> &str {
        &self.family
    }

    fn take(&mut self, key: &str) -> Option<Value> {
        let i = self.entries.iter().position(|(k, _)| k == key)?;
        Some(self.entries.remove(i).1)
    }

    fn err(&self, key: &str, message: String) -> OptionError {
        OptionError {
            key: key.to_string(),
            message,
        }
    }

    /// Takes a whole number in `lo..=hi`.
    pub fn int(&mut self, key: &str, lo: i64, hi: i64) -> Result<Option<i64>, OptionError> {
        let Some(v) = self.take(key) else {
            return Ok(None);
        };
        let n = match &v {
            Value::Integer(i) => *i,
            Value::Float(f) if f.fract() == 0.0 && f.abs() < 9e15 => *f as i64,
            other => {
                return Err(self.err(
                    key,
                    format!("must be a whole number, got {}", type_name(other)),
                ))
            }
        };
        if n < lo || n > hi {
            return Err(self.err(key, format!("must be between {lo} and {hi}, got {n}")));
        }
        Ok(Some(n))
    }

    /// Takes a finite number in `[lo, hi]`.
    pub fn number(&mut self, key: &str, lo: f64, hi: f64) -> Result<Option<f64>, OptionError> {
        let Some(v) = self.take(key) else {
            return Ok(None);
        };
        let x = match &v {
            Value::Integer(i) => *i as f64,
            Value::Float(f) => *f,
            other => {
                return Err(self.err(key, format!("must be a number, got {}", type_name(other))))
            }
        };
        if !x.is_finite() || x < lo || x > hi {
            let lower = if lo == f64::MIN_POSITIVE {
                "(0".to_string()
            } else {
                format!("[{}", crate::fmt::fmt_exact(lo))
            };
            // A positive number below the smallest normal one is inside "(0, ..." as written.
            let tiny = if x > 0.0 && x < lo {
                format!(
                    ", below the smallest number this key takes, {}",
                    crate::fmt::fmt_exact(lo)
                )
            } else {
                String::new()
            };
            return Err(self.err(
                key,
                format!(
                    "must be a number in {lower}, {}], got {}{tiny}",
                    crate::fmt::fmt_exact(hi),
                    crate::fmt::fmt_exact(x)
                ),
            ));
        }
        Ok(Some(x))
    }

    /// Takes `true` or `false`.
    pub fn boolean(&mut self, key: &str) -> Result<Option<bool>, OptionError> {
        match self.take(key) {
            None => Ok(None),
            Some(Value::Boolean(b)) => Ok(Some(b)),
            Some(other) => Err(self.err(
                key,
                format!("must be true or false, got {}", type_name(&other)),
            )),
        }
    }

    /// Takes one of the given words.
    pub fn choice(
        &mut self,
        key: &str,
        allowed: &[&'static str],
    ) -> Result<Option<&'static str>, OptionError> {
        let Some(v) = self.take(key) else {
            return Ok(None);
        };
        let expected = allowed
            .iter()
            .map(|a| format!("`{a}`"))
            .collect::<Vec<_>>()
            .join(", ");
        match &v {
            Value::String(s) => match allowed.iter().find(|a| **a == s.as_str()) {
                Some(a) => Ok(Some(a)),
                None => Err(self.err(key, format!("unknown value `{s}`; expected {expected}"))),
            },
            other => Err(self.err(
                key,
                format!("must be one of {expected}, got {}", type_name(other)),
            )),
        }
    }

    /// Takes a string.
    pub fn string(&mut self, key: &str) -> Result<Option<String>, OptionError> {
        match self.take(key) {
            None => Ok(None),
            Some(Value::String(s)) => Ok(Some(s)),
            Some(other) => {
                Err(self.err(key, format!("must be a string, got {}", type_name(&other))))
            }
        }
    }

    /// Takes a list of strings.
    pub fn strings(&mut self, key: &str) -> Result<Option<Vec<String>>, OptionError> {
        let Some(v) = self.take(key) else {
            return Ok(None);
        };
        let bad = |o: &Options| o.err(key, "must be a list of strings".to_string());
        match v {
            Value::Array(a) => a
                .into_iter()
                .map(|x| match x {
                    Value::String(s) => Ok(s),
                    _ => Err(bad(self)),
                })
                .collect::<Result<Vec<_>, _>>()
                .map(Some),
            _ => Err(bad(self)),
        }
    }

    /// Refuses whatever option is left (the first one, in the order written).
    pub fn finish(self) -> Result<(), OptionError> {
        match self.entries.first() {
            None => Ok(()),
            Some((k, _)) => {
                let known = crate::family::info(&self.family)
                    .map(|f| f.options)
                    .unwrap_or("none");
                Err(OptionError {
                    key: k.clone(),
                    message: format!(
                        "not an option of family `{}` (its options: {known})",
                        self.family
                    ),
                })
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn opts(pairs: &[(&str, Value)]) -> Options {
        Options::new(
            "tree",
            pairs
                .iter()
                .map(|(k, v)| (k.to_string(), v.clone()))
                .collect(),
        )
    }

    #[test]
    fn typed_getters_check_type_and_range() {
        let mut o = opts(&[
            ("min_samples_leaf", Value::Integer(0)),
            ("alpha", Value::String("x".into())),
        ]);
        let e = o.int("min_samples_leaf", 1, 100).unwrap_err();
        assert_eq!(e.key, "min_samples_leaf");
        assert!(e.message.contains("between 1 and 100"), "{e}");
        let e = o.number("alpha", 0.0, 1e6).unwrap_err();
        assert!(e.message.contains("must be a number"), "{e}");
        assert!(o.finish().is_ok());
    }

    #[test]
    fn leftovers_are_refused_by_name() {
        let mut o = opts(&[
            ("criterion", Value::String("gini".into())),
            ("depth", Value::Integer(3)),
        ]);
        assert_eq!(
            o.choice("criterion", &["gini", "entropy"]).unwrap(),
            Some("gini")
        );
        let e = o.finish().unwrap_err();
        assert_eq!(e.key, "depth");
        assert!(e.message.contains("not an option of family `tree`"), "{e}");
    }
}
