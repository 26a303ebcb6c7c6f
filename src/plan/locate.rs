//! Line and column of every node of a YAML document, by its path (`steps[3].checks[1].tolerance`).
//!
//! serde_yaml reports the position of the enclosing mapping at best, and none at all once the
//! document is a `Value`; a second, event-level pass over the same text gives each key and each
//! value its own position, so that an error can point at the exact line a user has to change.

use std::collections::HashMap;
use yaml_rust2::parser::{Event, MarkedEventReceiver, Parser};
use yaml_rust2::scanner::Marker;

/// A 1-based line and column in a source text.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct Position {
    pub line: usize,
    pub column: usize,
}

/// Positions of the keys and values of one YAML document, for the paths asked for (and the
/// nodes that enclose them): a plan of 100,000 steps with two mistakes keeps two positions, not
/// millions.
#[derive(Debug, Default)]
pub struct Locations {
    values: HashMap<String, Position>,
    keys: HashMap<String, Position>,
}

impl Locations {
    /// Reads the positions of every node of `text`.
    #[cfg(test)]
    pub fn of(text: &str) -> Locations {
        Locations::read(text, None)
    }

    /// Reads the positions of `paths` and of every node that encloses one of them. A text the
    /// YAML parser refuses gives no positions: the syntax error itself is reported by the
    /// deserialiser, with its own position.
    pub fn of_paths<'p>(text: &str, paths: impl IntoIterator<Item = &'p str>) -> Locations {
        let mut wanted = std::collections::HashSet::new();
        for path in paths {
            let mut p = path;
            wanted.insert(p.to_string());
            while let Some(cut) = p.rfind(['.', '[']) {
                p = &p[..cut];
                wanted.insert(p.to_string());
            }
            wanted.insert(String::new());
        }
        Locations::read(text, Some(wanted))
    }

    fn read(text: &str, wanted: Option<std::collections::HashSet<String>>) -> Locations {
        let mut walker = Walker {
            wanted,
            ..Walker::default()
        };
        let mut parser = Parser::new_from_str(text);
        if parser.load(&mut walker, false).is_err() {
            return Locations::default();
        }
        Locations {
            values: walker.values,
            keys: walker.keys,
        }
    }

    /// The position of the value at `path`, or of the nearest enclosing node that has one.
    pub fn value(&self, path: &str) -> Option<Position> {
        self.nearest(path, &self.values)
    }

    /// The position of the key that ends `path` (for "unknown field" errors), else of its value.
    pub fn key(&self, path: &str) -> Option<Position> {
        self.keys.get(path).copied().or_else(|| self.value(path))
    }

    fn nearest(&self, path: &str, table: &HashMap<String, Position>) -> Option<Position> {
        let mut candidate = path;
        loop {
            if let Some(pos) = table.get(candidate) {
                return Some(*pos);
            }
            let cut = candidate.rfind(['.', '['])?;
            candidate = &candidate[..cut];
            if candidate.is_empty() {
                return table.get("").copied();
            }
        }
    }
}

/// What the walker is inside of.
enum Frame {
    /// A mapping; `pending_key` is the key whose value comes next, if any.
    Mapping {
        path: String,
        pending_key: Option<String>,
    },
    Sequence {
        path: String,
        next_index: usize,
    },
}

#[derive(Default)]
struct Walker {
    stack: Vec<Frame>,
    values: HashMap<String, Position>,
    keys: HashMap<String, Position>,
    /// Only these paths are kept, where given.
    wanted: Option<std::collections::HashSet<String>>,
}

impl Walker {
    fn keep(&self, path: &str) -> bool {
        self.wanted.as_ref().is_none_or(|w| w.contains(path))
    }
}

impl Walker {
    /// The path of the node that starts now, or `None` when the node is a mapping key.
    fn next_node_path(&mut self, mark: Marker, scalar: Option<&str>) -> Option<String> {
        let pos = Position {
            line: mark.line(),
            column: mark.col() + 1,
        };
        match self.stack.last_mut() {
            None => Some(String::new()),
            Some(Frame::Sequence { path, next_index }) => {
                let p = format!("{path}[{next_index}]");
                *next_index += 1;
                Some(p)
            }
            Some(Frame::Mapping { path, pending_key }) => match pending_key.take() {
                Some(key) => Some(join(path, &key)),
                None => {
                    // A key: complex (non-scalar) keys get no name and so no position.
                    let key = scalar.unwrap_or("?").to_string();
                    let full = join(path, &key);
                    *pending_key = Some(key);
                    if self.wanted.as_ref().is_none_or(|w| w.contains(&full)) {
                        self.keys.insert(full, pos);
                    }
                    None
                }
            },
        }
        .inspect(|p| {
            if self.keep(p) {
                self.values.entry(p.clone()).or_insert(pos);
            }
        })
    }
}

fn join(path: &str, key: &str) -> String {
    if path.is_empty() {
        key.to_string()
    } else {
        format!("{path}.{key}")
    }
}

impl MarkedEventReceiver for Walker {
    fn on_event(&mut self, ev: Event, mark: Marker) {
        match ev {
            Event::Scalar(value, ..) => {
                self.next_node_path(mark, Some(&value));
            }
            Event::Alias(_) => {
                self.next_node_path(mark, None);
            }
            Event::MappingStart(..) => {
                let path = self.next_node_path(mark, None).unwrap_or_default();
                self.stack.push(Frame::Mapping {
                    path,
                    pending_key: None,
                });
            }
            Event::SequenceStart(..) => {
                let path = self.next_node_path(mark, None).unwrap_or_default();
                self.stack.push(Frame::Sequence {
                    path,
                    next_index: 0,
                });
            }
            Event::MappingEnd | Event::SequenceEnd => {
                self.stack.pop();
            }
            _ => {}
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const TEXT: &str = "id: demo\nsteps:\n  - id: a\n    checks:\n      - quantity: current\n        tolerance: {percent: 1 %}\n  - id: b\n";

    #[test]
    fn finds_values_and_keys_by_path() {
        let loc = Locations::of(TEXT);
        assert_eq!(loc.value("id"), Some(Position { line: 1, column: 5 }));
        assert_eq!(
            loc.key("steps[0].id"),
            Some(Position { line: 3, column: 5 })
        );
        assert_eq!(
            loc.value("steps[0].checks[0].tolerance.percent"),
            Some(Position {
                line: 6,
                column: 30
            })
        );
        assert_eq!(
            loc.value("steps[1].id"),
            Some(Position { line: 7, column: 9 })
        );
    }

    #[test]
    fn falls_back_to_the_nearest_enclosing_node() {
        let loc = Locations::of(TEXT);
        assert_eq!(loc.value("steps[1].load.current"), loc.value("steps[1]"));
    }
}
