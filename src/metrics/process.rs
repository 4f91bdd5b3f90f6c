//! The process series every Prometheus client exports by convention
//! (`process_cpu_seconds_total`, `process_resident_memory_bytes`,
//! `process_virtual_memory_bytes`, `process_open_fds`, `process_max_fds`,
//! `process_start_time_seconds`), read from `/proc/self` at each scrape.
//! Elsewhere than Linux there is no `/proc`, and none are exported.

use prometheus_client::collector::Collector;
use prometheus_client::encoding::{DescriptorEncoder, EncodeMetric};
use prometheus_client::metrics::counter::ConstCounter;
use prometheus_client::metrics::gauge::ConstGauge;

#[derive(Debug, Default)]
pub struct ProcessCollector;

/// What one scrape reads.
#[derive(Debug, Default, Clone, Copy, PartialEq)]
pub struct ProcessSample {
    pub cpu_seconds: f64,
    pub resident_bytes: f64,
    pub virtual_bytes: f64,
    pub open_fds: f64,
    pub max_fds: Option<f64>,
    pub start_time_seconds: Option<f64>,
}

/// Reads the sample from `/proc/self` (None where it cannot be read).
pub fn sample() -> Option<ProcessSample> {
    let stat = std::fs::read_to_string("/proc/self/stat").ok()?;
    // The command name (field 2) is in parentheses and may hold spaces:
    // the fields after it are counted from the last ')'.
    let after = stat.rsplit_once(')')?.1;
    let f: Vec<&str> = after.split_whitespace().collect();
    // After the name, field k of proc(5) is at index k - 3.
    let field = |k: usize| f.get(k - 3).and_then(|v| v.parse::<f64>().ok());
    // SAFETY: sysconf reads a constant of the system; no memory is shared.
    let ticks = unsafe { libc::sysconf(libc::_SC_CLK_TCK) } as f64;
    let page = unsafe { libc::sysconf(libc::_SC_PAGESIZE) } as f64;
    if ticks <= 0.0 || page <= 0.0 {
        return None;
    }
    let cpu_seconds = (field(14)? + field(15)?) / ticks;
    let virtual_bytes = field(23)?;
    let resident_bytes = field(24)? * page;
    let open_fds = std::fs::read_dir("/proc/self/fd").ok()?.count() as f64;
    let max_fds = std::fs::read_to_string("/proc/self/limits")
        .ok()
        .and_then(|l| {
            l.lines()
                .find(|line| line.starts_with("Max open files"))
                .and_then(|line| line.split_whitespace().nth(3))
                .and_then(|v| v.parse::<f64>().ok())
        });
    let boot = std::fs::read_to_string("/proc/stat").ok().and_then(|s| {
        s.lines()
            .find_map(|l| l.strip_prefix("btime "))
            .and_then(|v| v.trim().parse::<f64>().ok())
    });
    let start_time_seconds = boot.zip(field(22)).map(|(b, start)| b + start / ticks);
    Some(ProcessSample {
        cpu_seconds,
        resident_bytes,
        virtual_bytes,
        open_fds,
        max_fds,
        start_time_seconds,
    })
}

impl Collector for ProcessCollector {
    fn encode(&self, mut encoder: DescriptorEncoder) -> Result<(), std::fmt::Error> {
        let Some(s) = sample() else {
            return Ok(());
        };
        let cpu = ConstCounter::new(s.cpu_seconds);
        cpu.encode(encoder.encode_descriptor(
            "process_cpu_seconds",
            "Total user and system CPU time spent in seconds",
            None,
            cpu.metric_type(),
        )?)?;
        let mut gauges = vec![
            (
                "process_resident_memory_bytes",
                "Resident memory size in bytes",
                s.resident_bytes,
            ),
            (
                "process_virtual_memory_bytes",
                "Virtual memory size in bytes",
                s.virtual_bytes,
            ),
            (
                "process_open_fds",
                "Number of open file descriptors",
                s.open_fds,
            ),
        ];
        if let Some(max) = s.max_fds {
            gauges.push((
                "process_max_fds",
                "Maximum number of open file descriptors",
                max,
            ));
        }
        if let Some(start) = s.start_time_seconds {
            gauges.push((
                "process_start_time_seconds",
                "Start time of the process since the Unix epoch in seconds",
                start,
            ));
        }
        for (name, help, value) in gauges {
            let g = ConstGauge::new(value);
            g.encode(encoder.encode_descriptor(name, help, None, g.metric_type())?)?;
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_sample_reads_this_process() {
        let Some(s) = sample() else {
            // No /proc: nothing is exported, which the collector allows.
            return;
        };
        // This test process holds at least a few MiB and a few descriptors
        // (stdin, stdout, stderr), and started within the last day.
        assert!(s.resident_bytes > 1e6, "{s:?}");
        assert!(s.virtual_bytes >= s.resident_bytes, "{s:?}");
        assert!(s.open_fds >= 3.0, "{s:?}");
        assert!(s.cpu_seconds >= 0.0, "{s:?}");
        let now = std::time::SystemTime::now()
            .duration_since(std::time::UNIX_EPOCH)
            .map(|d| d.as_secs_f64())
            .unwrap_or(0.0);
        let start = s.start_time_seconds.unwrap_or(0.0);
        assert!(now - start >= 0.0 && now - start < 86_400.0, "{s:?}");
    }
}
