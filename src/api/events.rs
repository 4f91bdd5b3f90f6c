//! EventFeed: stored events, and a live stream that first replays.

use std::pin::Pin;
use std::sync::Arc;

use tokio::sync::broadcast::error::RecvError;
use tokio_stream::Stream;
use tonic::{Request, Response, Status};

use super::pb;
use super::status::from_monitor;
use crate::auth::caller;
use crate::domain::EventRecord;
use crate::monitor::Monitor;

pub struct EventService {
    pub monitor: Arc<Monitor>,
}

fn event_pb(e: EventRecord) -> pb::Event {
    pb::Event {
        id: e.id as u64,
        dataset: e.dataset,
        kind: e.kind,
        at_ms: e.at_ms,
        snapshot_id: e.snapshot_id as u64,
        summary: e.summary,
        details_json: e.details_json,
    }
}

impl EventService {
    async fn stored(
        &self,
        dataset: &str,
        after: u64,
        limit: i64,
    ) -> Result<Vec<pb::Event>, Status> {
        let id = if dataset.is_empty() {
            None
        } else {
            Some(self.monitor.dataset_id(dataset).map_err(from_monitor)?)
        };
        Ok(self
            .monitor
            .store()
            .events(id, after as i64, limit)
            .await
            .map_err(|e| from_monitor(e.into()))?
            .into_iter()
            .map(event_pb)
            .collect())
    }
}

type EventStream = Pin<Box<dyn Stream<Item = Result<pb::Event, Status>> + Send>>;

#[tonic::async_trait]
impl pb::event_feed_server::EventFeed for EventService {
    #[tracing::instrument(skip_all, fields(rpc = "ListEvents"))]
    async fn list_events(
        &self,
        request: Request<pb::ListEventsRequest>,
    ) -> Result<Response<pb::ListEventsResponse>, Status> {
        let who = caller(&request)?;
        let r = request.into_inner();
        who.require_read_filter(&r.dataset)?;
        let limit = match r.limit {
            0 => 100,
            n => n.min(1000),
        };
        Ok(Response::new(pb::ListEventsResponse {
            events: self
                .stored(&r.dataset, r.after_id, i64::from(limit))
                .await?,
        }))
    }

    type WatchEventsStream = EventStream;

    #[tracing::instrument(skip_all, fields(rpc = "WatchEvents"))]
    async fn watch_events(
        &self,
        request: Request<pb::WatchEventsRequest>,
    ) -> Result<Response<Self::WatchEventsStream>, Status> {
        let who = caller(&request)?;
        let r = request.into_inner();
        who.require_read_filter(&r.dataset)?;
        // Subscribe before reading the store so nothing falls between the
        // replay and the live stream; duplicates are skipped by id.
        let mut live = self.monitor.subscribe();
        let replay = self.stored(&r.dataset, r.after_id, i64::MAX).await?;
        let mut shutdown = self.monitor.shutdown_signal().subscribe();
        let dataset = r.dataset;
        let (tx, rx) = tokio::sync::mpsc::channel(64);
        tokio::spawn(async move {
            let mut last = r.after_id;
            for e in replay {
                last = e.id;
                if tx.send(Ok(e)).await.is_err() {
                    return;
                }
            }
            loop {
                let event = tokio::select! {
                    // The stream ends with the server, so shutdown can drain.
                    _ = shutdown.recv() => return,
                    _ = tx.closed() => return,
                    e = live.recv() => e,
                };
                match event {
                    Ok(e) if e.id as u64 > last && (dataset.is_empty() || e.dataset == dataset) => {
                        last = e.id as u64;
                        if tx.send(Ok(event_pb(e))).await.is_err() {
                            return;
                        }
                    }
                    Ok(_) => {}
                    Err(RecvError::Lagged(n)) => {
                        let _ = tx
                            .send(Err(Status::data_loss(format!(
                                "the watcher fell {n} events behind; resume with after_id = {last}"
                            ))))
                            .await;
                        return;
                    }
                    Err(RecvError::Closed) => return,
                }
            }
        });
        Ok(Response::new(Box::pin(
            tokio_stream::wrappers::ReceiverStream::new(rx),
        )))
    }
}
