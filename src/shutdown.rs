//! Graceful shutdown as one small type: a broadcast receiver plus a flag
//! remembering that the signal was already seen, so every task can wait on
//! it once or poll it cheaply.

use tokio::sync::broadcast;

#[derive(Debug)]
pub struct Shutdown {
    seen: bool,
    notify: broadcast::Receiver<()>,
}

impl Shutdown {
    pub fn new(notify: broadcast::Receiver<()>) -> Self {
        Self {
            seen: false,
            notify,
        }
    }

    pub fn is_shutdown(&self) -> bool {
        self.seen
    }

    /// Waits for the signal (returns at once if it was already seen).
    pub async fn recv(&mut self) {
        if self.seen {
            return;
        }
        // A closed channel means the sender is gone: treat it as the signal.
        let _ = self.notify.recv().await;
        self.seen = true;
    }
}

/// The sending side, held by the server.
#[derive(Debug, Clone)]
pub struct ShutdownSignal {
    sender: broadcast::Sender<()>,
}

impl Default for ShutdownSignal {
    fn default() -> Self {
        Self::new()
    }
}

impl ShutdownSignal {
    pub fn new() -> Self {
        let (sender, _) = broadcast::channel(1);
        Self { sender }
    }

    pub fn subscribe(&self) -> Shutdown {
        Shutdown::new(self.sender.subscribe())
    }

    pub fn fire(&self) {
        let _ = self.sender.send(());
    }
}
