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

/// The read-ahead window, in bytes, of the block device that holds `file`
/// (its `read_ahead_kb`), or None where the system does not say: not
/// Linux, or a file system with no single device behind it.
pub fn device_read_ahead(file: &std::fs::File) -> Option<u64> {
    #[cfg(target_os = "linux")]
    {
        use std::os::unix::fs::MetadataExt;
        let dev = file.metadata().ok()?.dev();
        read_ahead_of(dev, |p| std::fs::read_to_string(p).ok())
    }
    #[cfg(not(target_os = "linux"))]
    {
        let _ = file;
        None
    }
}

/// `read_ahead_kb` in bytes for device number `dev` (as `stat` gives it),
/// read with `read`: the device's backing-device entry, else its block
/// queue, else the queue of the disk a partition belongs to
/// (sysfs-block(5), common practice).
#[cfg(target_os = "linux")]
fn read_ahead_of(dev: u64, read: impl Fn(&Path) -> Option<String>) -> Option<u64> {
    let id = format!("{}:{}", libc::major(dev), libc::minor(dev));
    [
        format!("/sys/class/bdi/{id}/read_ahead_kb"),
        format!("/sys/dev/block/{id}/queue/read_ahead_kb"),
        format!("/sys/dev/block/{id}/../queue/read_ahead_kb"),
    ]
    .iter()
    .find_map(|p| read(Path::new(p))?.trim().parse::<u64>().ok())
    .map(|kb| kb * 1024)
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

    #[cfg(target_os = "linux")]
    #[test]
    fn read_ahead_of_the_device_or_the_disk_of_its_partition() {
        // 254:0 as stat(2) gives it: os.makedev(254, 0) in Python is 65024.
        let disk = 65024;
        let read = reader(&[("/sys/class/bdi/254:0/read_ahead_kb", "8192\n")]);
        assert_eq!(read_ahead_of(disk, &read), Some(8 << 20));
        // Partition 259:3 of an NVMe disk: only the disk's queue says.
        let part = 66307; // os.makedev(259, 3)
        let read = reader(&[("/sys/dev/block/259:3/../queue/read_ahead_kb", "128\n")]);
        assert_eq!(read_ahead_of(part, &read), Some(128 << 10));
        // A major above 4095 and a minor above 255: Python's
        // os.makedev(4660, 74565) (glibc's encoding) is 17592491324485.
        let read = reader(&[("/sys/class/bdi/4660:74565/read_ahead_kb", "64")]);
        assert_eq!(read_ahead_of(17592491324485, &read), Some(64 << 10));
        assert_eq!(read_ahead_of(disk, reader(&[])), None);
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
