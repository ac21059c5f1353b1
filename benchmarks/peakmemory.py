"""What the benchmarks' memory figures read: a process's peak resident memory."""


def peak_rss_mb():
    """This process's peak resident memory in MB (VmHWM: unlike ru_maxrss it does not carry over from the
    parent across exec, so a child started to measure one step reports that step alone)."""
    with open("/proc/self/status") as status:
        for line in status:
            if line.startswith("VmHWM:"):
                return float(line.split()[1]) / 1024.0
    raise RuntimeError("no VmHWM in /proc/self/status")
