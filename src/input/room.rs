//! How much page cache a run can expect to keep: whether the logits it
//! streams can stay cached for the next run at all.
//!
//! Why it matters: a pass reads its files once, front to back. Where they
//! fit in memory, the pages it leaves behind let the next run on the same
//! files skip the disk. Where they do not, those pages are evicted before
//! a next run could use them (the pass itself pushes them out), and
//! leaving them to the kernel's reclaim only costs: on a two-thread run
//! within a memory cgroup a quarter the size of the files, both workers
//! reclaimed page cache as they read and contended for the same lock, and
//! the run took 1.4 times as long as one that dropped its finished rows
//! itself (see DEVELOPERS.md, "Reading rows").

use std::path::Path;

/// Bytes of memory the page cache can hold for this process: the system's
/// `MemAvailable`, and no more than the memory limit of any cgroup this
/// process is in (v1 or v2, the cgroup and each one above it). None where
/// the system does not say (not Linux).
pub fn cache_room() -> Option<u64> {
    let meminfo = std::fs::read_to_string("/proc/meminfo").ok()?;
    let avail = mem_available(&meminfo)?;
    let limit = std::fs::read_to_string("/proc/self/cgroup")
        .ok()
        .and_then(|c| {
            cgroup_limit(&c, Path::new("/sys/fs/cgroup"), |p| {
                std::fs::read_to_string(p).ok()
            })
        });
    Some(limit.map_or(avail, |l| l.min(avail)))
}

/// `MemAvailable` of /proc/meminfo, in bytes.
fn mem_available(meminfo: &str) -> Option<u64> {
    let line = meminfo.lines().find(|l| l.starts_with("MemAvailable:"))?;
    let mut it = line.split_whitespace().skip(1);
    let v: u64 = it.next()?.parse().ok()?;
    match it.next() {
        Some("kB") => Some(v * 1024),
        None => Some(v),
        Some(_) => None,
    }
}

/// The smallest memory limit over this process's cgroups and their
/// ancestors, from /proc/self/cgroup (`cgroups`) and the limit files under
/// `root` (read with `read`). v2 lines ("0::/path") name `memory.max`
/// ("max" for none); v1 lines whose controllers include memory name
/// `memory/.../memory.limit_in_bytes` (a huge value for none).
fn cgroup_limit(cgroups: &str, root: &Path, read: impl Fn(&Path) -> Option<String>) -> Option<u64> {
    let mut best: Option<u64> = None;
    for line in cgroups.lines() {
        let mut parts = line.splitn(3, ':');
        let (Some(_), Some(ctl), Some(path)) = (parts.next(), parts.next(), parts.next()) else {
            continue;
        };
        let (dir, file) = if ctl.is_empty() {
            (root.to_path_buf(), "memory.max")
        } else if ctl.split(',').any(|c| c == "memory") {
            (root.join("memory"), "memory.limit_in_bytes")
        } else {
            continue;
        };
        let rel = Path::new(path.trim_start_matches('/'));
        for anc in rel.ancestors() {
            let Some(text) = read(&dir.join(anc).join(file)) else {
                continue;
            };
            // "max", or v1's "no limit" (the largest page-aligned i64),
            // parse as no limit.
            if let Ok(v) = text.trim().parse::<u64>() {
                if v < 1 << 62 {
                    best = Some(best.map_or(v, |b| b.min(v)));
                }
            }
        }
    }
    best
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::collections::HashMap;

    #[test]
    fn mem_available_in_bytes() {
        // The format of /proc/meminfo (proc(5)): values in kB.
        let m = "MemTotal:       24683840 kB\nMemFree:        18551376 kB\nMemAvailable:   24117476 kB\n";
        assert_eq!(mem_available(m), Some(24117476 * 1024));
        assert_eq!(mem_available("MemTotal: 1 kB\n"), None);
    }

    fn reader(files: &[(&str, &str)]) -> impl Fn(&Path) -> Option<String> {
        let m: HashMap<String, String> = files
            .iter()
            .map(|(k, v)| (k.to_string(), v.to_string()))
            .collect();
        move |p: &Path| m.get(p.to_str().unwrap()).cloned()
    }

    #[test]
    fn v2_limit_of_the_cgroup_or_one_above_it() {
        let root = Path::new("/cg");
        let read = reader(&[
            ("/cg/a/memory.max", "1073741824\n"),
            ("/cg/a/b/memory.max", "max\n"),
        ]);
        assert_eq!(cgroup_limit("0::/a/b\n", root, &read), Some(1 << 30));
        let read = reader(&[
            ("/cg/a/memory.max", "max\n"),
            ("/cg/a/b/memory.max", "268435456\n"),
        ]);
        assert_eq!(cgroup_limit("0::/a/b\n", root, &read), Some(256 << 20));
        assert_eq!(cgroup_limit("0::/\n", root, reader(&[])), None);
    }

    #[test]
    fn v1_memory_line_and_its_no_limit_value() {
        let root = Path::new("/cg");
        let cg = "9:name=systemd:/\n4:memory:/jobs/run1\n1:cpu,cpuacct:/\n";
        let read = reader(&[
            ("/cg/memory/memory.limit_in_bytes", "9223372036854771712\n"),
            (
                "/cg/memory/jobs/memory.limit_in_bytes",
                "9223372036854771712\n",
            ),
            ("/cg/memory/jobs/run1/memory.limit_in_bytes", "536870912\n"),
        ]);
        assert_eq!(cgroup_limit(cg, root, &read), Some(512 << 20));
        let read = reader(&[(
            "/cg/memory/jobs/run1/memory.limit_in_bytes",
            "9223372036854771712\n",
        )]);
        assert_eq!(cgroup_limit(cg, root, &read), None);
    }
}
