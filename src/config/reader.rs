//! A typed reader over a TOML document that remembers where every key was
//! written, so that every error names the file, the line and the key.

use std::collections::{BTreeMap, BTreeSet};

use toml_edit::{DocumentMut, ImDocument, Item, Value};

use super::ConfigError;

/// Parsed TOML with key positions and command-line overrides applied.
pub struct Reader {
    origin: String,
    doc: DocumentMut,
    lines: BTreeMap<String, usize>,
    overridden: BTreeSet<String>,
}

fn line_of(text: &str, offset: usize) -> usize {
    text.as_bytes()[..offset.min(text.len())]
        .iter()
        .filter(|&&b| b == b'\n')
        .count()
        + 1
}

fn collect_lines(
    text: &str,
    prefix: &str,
    table: &toml_edit::Table,
    out: &mut BTreeMap<String, usize>,
) {
    for (key, item) in table.iter() {
        let path = if prefix.is_empty() {
            key.to_string()
        } else {
            format!("{prefix}.{key}")
        };
        let span = table
            .key(key)
            .and_then(|k| k.span())
            .or_else(|| item.span());
        if let Some(span) = span {
            out.insert(path.clone(), line_of(text, span.start));
        }
        if let Some(t) = item.as_table() {
            collect_lines(text, &path, t, out);
        }
    }
}

impl Reader {
    /// Parse `text` (from `origin`) and apply `key=value` overrides.
    pub fn parse(text: &str, origin: &str, overrides: &[String]) -> Result<Self, ConfigError> {
        let im = ImDocument::parse(text.to_string()).map_err(|e| {
            let line = e.span().map(|s| line_of(text, s.start));
            let msg = e.message().trim_end().to_string();
            ConfigError {
                origin: origin.into(),
                line,
                key: None,
                message: format!("not valid TOML: {msg}"),
            }
        })?;
        let mut lines = BTreeMap::new();
        collect_lines(text, "", im.as_table(), &mut lines);
        let doc = im.into_mut();
        let mut reader = Self {
            origin: origin.into(),
            doc,
            lines,
            overridden: BTreeSet::new(),
        };
        for o in overrides {
            reader.apply_override(o)?;
        }
        Ok(reader)
    }

    fn apply_override(&mut self, text: &str) -> Result<(), ConfigError> {
        let err = |key: Option<String>, message: String| ConfigError {
            origin: "--set".into(),
            line: None,
            key,
            message,
        };
        let (path, raw) = text
            .split_once('=')
            .ok_or_else(|| err(None, format!("`{text}` is not of the form key=value")))?;
        let path = path.trim();
        let raw = raw.trim();
        let parts: Vec<&str> = path.split('.').collect();
        if path.is_empty() || parts.iter().any(|p| p.is_empty()) {
            return Err(err(
                None,
                format!("`{path}` is not a key path such as dynamics.timestep_fs"),
            ));
        }
        // A value that is not valid TOML (a bare word) is taken as a string.
        let value: Value = raw.parse().unwrap_or_else(|_| Value::from(raw));
        let mut table = self.doc.as_table_mut();
        for part in &parts[..parts.len() - 1] {
            let entry = table.entry(part).or_insert(toml_edit::table());
            table = match entry.as_table_mut() {
                Some(t) => t,
                None => {
                    return Err(err(
                        Some(path.into()),
                        format!("`{part}` is a value, not a table"),
                    ))
                }
            };
        }
        table.insert(parts[parts.len() - 1], Item::Value(value));
        self.overridden.insert(path.into());
        Ok(())
    }

    /// The document text after overrides (stored with runs).
    pub fn effective_text(&self) -> String {
        self.doc.to_string()
    }

    /// The origin label (file name).
    pub fn origin(&self) -> &str {
        &self.origin
    }

    /// An error about `key`, located at its line (or at the override).
    pub fn error(&self, key: &str, message: impl Into<String>) -> ConfigError {
        if self.overridden.contains(key) {
            return ConfigError {
                origin: "--set".into(),
                line: None,
                key: Some(key.into()),
                message: message.into(),
            };
        }
        let line = self.lines.get(key).copied().or_else(|| {
            // A missing key: point at its table header if there is one.
            key.rsplit_once('.')
                .and_then(|(t, _)| self.lines.get(t).copied())
        });
        ConfigError {
            origin: self.origin.clone(),
            line,
            key: Some(key.into()),
            message: message.into(),
        }
    }

    fn item(&self, path: &str) -> Option<&Item> {
        let mut parts = path.split('.');
        let mut item = self.doc.as_table().get(parts.next()?)?;
        for p in parts {
            item = item.as_table_like()?.get(p)?;
        }
        Some(item)
    }

    /// Whether a key is present.
    pub fn has(&self, path: &str) -> bool {
        self.item(path).is_some()
    }

    /// Every key path in the document (tables and values).
    pub fn all_keys(&self) -> Vec<(String, bool)> {
        fn walk(prefix: &str, t: &dyn toml_edit::TableLike, out: &mut Vec<(String, bool)>) {
            for (k, item) in t.iter() {
                let path = if prefix.is_empty() {
                    k.to_string()
                } else {
                    format!("{prefix}.{k}")
                };
                match item.as_table_like() {
                    Some(inner) => {
                        out.push((path.clone(), true));
                        walk(&path, inner, out);
                    }
                    None => out.push((path, false)),
                }
            }
        }
        let mut out = Vec::new();
        walk("", self.doc.as_table(), &mut out);
        out
    }

    fn type_name(item: &Item) -> &'static str {
        match item {
            Item::None => "nothing",
            Item::Table(_) | Item::ArrayOfTables(_) => "a table",
            Item::Value(v) => match v {
                Value::String(_) => "a string",
                Value::Integer(_) => "an integer",
                Value::Float(_) => "a number",
                Value::Boolean(_) => "a boolean",
                Value::Datetime(_) => "a date",
                Value::Array(_) => "an array",
                Value::InlineTable(_) => "a table",
            },
        }
    }

    /// A number (integers are accepted), if present.
    pub fn f64(&self, path: &str) -> Result<Option<f64>, ConfigError> {
        let Some(item) = self.item(path) else {
            return Ok(None);
        };
        let x = match item.as_value() {
            Some(Value::Float(f)) => *f.value(),
            Some(Value::Integer(i)) => *i.value() as f64,
            _ => {
                return Err(self.error(
                    path,
                    format!("expected a number, found {}", Self::type_name(item)),
                ))
            }
        };
        if !x.is_finite() {
            return Err(self.error(path, format!("must be finite, found {x}")));
        }
        Ok(Some(x))
    }

    /// A non-negative integer, if present.
    pub fn u64(&self, path: &str) -> Result<Option<u64>, ConfigError> {
        let Some(item) = self.item(path) else {
            return Ok(None);
        };
        match item.as_value() {
            Some(Value::Integer(i)) if *i.value() >= 0 => Ok(Some(*i.value() as u64)),
            Some(Value::Integer(i)) => {
                Err(self.error(path, format!("must not be negative, found {}", i.value())))
            }
            _ => Err(self.error(
                path,
                format!("expected a whole number, found {}", Self::type_name(item)),
            )),
        }
    }

    /// A string, if present.
    pub fn string(&self, path: &str) -> Result<Option<String>, ConfigError> {
        let Some(item) = self.item(path) else {
            return Ok(None);
        };
        match item.as_str() {
            Some(s) => Ok(Some(s.to_string())),
            None => Err(self.error(
                path,
                format!("expected a string, found {}", Self::type_name(item)),
            )),
        }
    }

    /// One of `choices`, if present; the message lists them and the nearest.
    pub fn choice(&self, path: &str, choices: &[&str]) -> Result<Option<String>, ConfigError> {
        let Some(s) = self.string(path)? else {
            return Ok(None);
        };
        if choices.contains(&s.as_str()) {
            return Ok(Some(s));
        }
        let list = choices
            .iter()
            .map(|c| format!("\"{c}\""))
            .collect::<Vec<_>>()
            .join(", ");
        let hint = super::suggest::nearest(&s, choices.iter().copied())
            .map(|n| format!("; did you mean \"{n}\"?"))
            .unwrap_or_default();
        Err(self.error(path, format!("\"{s}\" is not one of {list}{hint}")))
    }

    /// A pair of numbers [a, b], if present.
    pub fn pair(&self, path: &str) -> Result<Option<(f64, f64)>, ConfigError> {
        let Some(item) = self.item(path) else {
            return Ok(None);
        };
        let arr = item.as_array().filter(|a| a.len() == 2);
        let nums: Option<Vec<f64>> = arr.map(|a| {
            a.iter()
                .filter_map(|v| match v {
                    Value::Float(f) => Some(*f.value()),
                    Value::Integer(i) => Some(*i.value() as f64),
                    _ => None,
                })
                .filter(|x| x.is_finite())
                .collect()
        });
        match nums {
            Some(v) if v.len() == 2 => Ok(Some((v[0], v[1]))),
            _ => Err(self.error(
                path,
                format!(
                    "expected two numbers [low, high], found {}",
                    Self::type_name(item)
                ),
            )),
        }
    }
}
