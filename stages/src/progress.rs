//! Inner progress of a stage, reported to whoever runs it (the command line draws it as a
//! bar; tests and benchmarks pass [`Progress::none`]). Safe to call from worker threads.

use std::sync::Arc;

type Sink = dyn Fn(Event) + Send + Sync;

/// What a stage reports.
#[derive(Clone, Debug, PartialEq)]
pub enum Event {
    /// A unit of work with `total` steps, described by `what` (e.g. "exports cleaned").
    Start { total: u64, what: String },
    /// `n` more steps done.
    Step(u64),
}

/// A progress sink, or none.
#[derive(Clone, Default)]
pub struct Progress {
    sink: Option<Arc<Sink>>,
}

impl Progress {
    /// Reports nothing.
    pub fn none() -> Progress {
        Progress { sink: None }
    }
    /// Reports to `f`.
    pub fn new(f: impl Fn(Event) + Send + Sync + 'static) -> Progress {
        Progress {
            sink: Some(Arc::new(f)),
        }
    }
    pub fn start(&self, total: u64, what: &str) {
        if let Some(s) = &self.sink {
            s(Event::Start {
                total,
                what: what.into(),
            });
        }
    }
    pub fn step(&self) {
        if let Some(s) = &self.sink {
            s(Event::Step(1));
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::sync::Mutex;

    #[test]
    fn events_reach_the_sink_in_order() {
        let seen = Arc::new(Mutex::new(Vec::new()));
        let s2 = seen.clone();
        let p = Progress::new(move |e| s2.lock().unwrap().push(e));
        p.start(2, "things");
        p.step();
        Progress::none().step();
        assert_eq!(
            *seen.lock().unwrap(),
            vec![
                Event::Start {
                    total: 2,
                    what: "things".into()
                },
                Event::Step(1)
            ]
        );
    }
}
