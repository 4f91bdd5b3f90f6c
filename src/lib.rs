//! plumbline keeps scoring deployed treatment-effect (CATE / uplift) models
//! against the factual outcomes that arrive after their predictions, without
//! ever seeing a counterfactual.
//!
//! A map of the modules, in the order a newcomer should meet them:
//!
//! - [`estimate`]: the statistics, as pure functions over arrays. Cross-fitted
//!   nuisance models, the AIPW pseudo-outcome, one file per error estimator
//!   (corrected PEHE, plug-in PEHE, DR loss, R-loss, IPW loss), mergeable
//!   aggregates, ranking with a best set, policy gain, targeting curves,
//!   calibration and overlap, a lower bound on each model's RMSE that
//!   needs no nuisance model to be right, cross-fitted convex blends of the
//!   models, and the stream watch behind the alerts
//!   (confidence sequences and change detectors that stay valid however
//!   often they are looked at). Knows nothing of files, networks or async.
//! - [`domain`]: the service's own records (dataset settings, the rows
//!   that arrive, published boards, history values, events), shared by the
//!   store, the monitor and the api; free of the wire and of any backend.
//! - [`store`]: the storage contract (five small traits in domain records,
//!   with the integrity rules every backend keeps, leases and fencing) and
//!   its backends, `store::sqlite` (one server) and `store::postgres`
//!   (several sharing it); `store::open` is the one place naming a backend.
//! - [`monitor`]: per-dataset state: the in-memory columnar cache, intake
//!   validation and the integrity rules, the recompute job and its scheduler,
//!   windows, snapshots, the events the stream watch raises, and on a shared
//!   store the datasets' ownership and catching up with the other servers.
//! - [`api`]: the gRPC surface, thin adapters from the wire contract in
//!   `proto/` to the monitor, the only module that converts to and from the
//!   wire, with one mapping of errors to status codes.
//! - [`auth`]: bearer tokens with `admin` / `read:<dataset>` /
//!   `write:<dataset>` scopes, stored as digests, checked by a gRPC
//!   interceptor and by each handler for its dataset.
//! - [`metrics`]: Prometheus series and the HTTP listener for `/metrics`,
//!   `/healthz` and `/readyz`.
//! - [`page`]: the status page on that listener (`/`): each dataset's
//!   board, history, propensities, events and alert states, drawn on the
//!   server as HTML with inline SVG by pure functions.
//! - [`server`], [`config`], [`shutdown`]: starting, configuring and
//!   draining the service; [`limits`]: what one client may ask of it.
//! - [`input`]: reading units and predictions from CSV files, with errors that
//!   name the file, row and column.
//! - [`synth`]: published simulation designs with known effects (and a
//!   three-arm design of our own), used by the
//!   checks, the benchmarks and `plumbline simulate`.
//! - [`cli`]: the `plumbline` command line: `serve`, `demo`, `score`,
//!   `simulate`, `ingest`, `loadtest`, `token`, and the client commands
//!   `datasets`, `models`, `scoreboard`, `history`, `events`, `overlap`.

pub mod api;
pub mod auth;
pub mod cli;
pub mod config;
pub mod domain;
pub mod estimate;
pub mod input;
pub mod limits;
pub mod metrics;
pub mod monitor;
pub mod page;
pub mod server;
pub mod shutdown;
pub mod store;
pub mod synth;
