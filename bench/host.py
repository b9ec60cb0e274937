"""Platform facts read in one place, so every other module sees the same typed record of the host."""

from __future__ import annotations

import dataclasses
import functools
import hashlib
import json
import os
import platform
import re
import socket
import sys
from dataclasses import dataclass
from typing import Any, Iterable, Mapping

from eaves.errors import InputError

SYS_CPU = "sys/devices/system/cpu"

# Feature names as the Linux kernel spells them in /proc/cpuinfo; only those that decide
# which vector and matrix kernels can run. "pni" is the kernel's name for SSE3.
X86_FEATURES = frozenset(
    "sse sse2 sse3 ssse3 sse4_1 sse4_2 avx avx2 fma fma4 f16c avx512f avx512dq avx512cd avx512bw "
    "avx512vl avx512ifma avx512vbmi avx512_vnni avx512_bf16 avx512_fp16 avx_vnni "
    "amx_tile amx_bf16 amx_int8 amx_fp16".split())
ARM_FEATURES = frozenset(
    "asimd asimdhp fphp asimddp asimdfhm asimdrdm bf16 i8mm sve sve2 svebf16 svei8mm "
    "svef32mm svef64mm sme sme2".split())
FEATURE_ALIASES = {"pni": "sse3"}

X86_VENDORS = {"GenuineIntel": "Intel", "AuthenticAMD": "AMD", "HygonGenuine": "Hygon"}
# Arm "CPU implementer" codes and a few server core "CPU part" codes (from memory of the
# Arm architecture reference's MIDR tables); unknown codes are shown as hex.
ARM_IMPLEMENTERS = {0x41: "Arm", 0x43: "Cavium", 0x46: "Fujitsu", 0x48: "HiSilicon",
                    0x4E: "NVIDIA", 0x51: "Qualcomm", 0x61: "Apple", 0xC0: "Ampere"}
ARM_PARTS = {(0x41, 0xD0C): "Neoverse-N1", (0x41, 0xD40): "Neoverse-V1",
             (0x41, 0xD49): "Neoverse-N2", (0x41, 0xD4F): "Neoverse-V2",
             (0x41, 0xD84): "Neoverse-V3", (0x41, 0xD8E): "Neoverse-N3",
             (0xC0, 0xAC3): "AmpereOne", (0x46, 0x001): "A64FX"}
# DMI strings and clock sources that name a hypervisor (common practice, from memory).
DMI_HYPERVISORS = (("qemu", "qemu"), ("kvm", "kvm"), ("vmware", "vmware"), ("virtualbox", "virtualbox"),
                   ("innotek", "virtualbox"), ("xen", "xen"), ("microsoft corporation virtual machine", "hyper-v"),
                   ("amazon ec2", "amazon-ec2"), ("google compute engine", "google"), ("bhyve", "bhyve"),
                   ("parallels", "parallels"))
CLOCKSOURCE_HYPERVISORS = {"kvm-clock": "kvm", "xen": "xen", "hyperv_clocksource_tsc_page": "hyper-v"}
BLAS_KEYS = ("internal_api", "version", "num_threads", "architecture", "filepath")
# Fields that describe the hardware; the fingerprint hashes these (plus memory in GiB) only.
HARDWARE_FIELDS = ("vendor", "model", "arch", "cpu_family", "cpu_model_number", "stepping", "features",
                   "vector_bits", "logical_cpus", "physical_cores", "sockets", "numa_nodes", "caches")


@dataclass(frozen=True)
class CacheLevel:
    """One cache of the hierarchy as the OS reports it for one CPU."""

    level: int  # 1, 2, 3, 4
    kind: str  # "data" | "instruction" | "unified"
    size_bytes: int
    line_bytes: int | None
    shared_cpus: int | None  # logical CPUs that share one instance
    instances: int | None  # instances on the host


@dataclass(frozen=True)
class HostFacts:
    """What the host is (hardware) and how it was set up (software, load) when the facts were read."""

    hostname: str
    vendor: str | None
    model: str | None
    arch: str
    cpu_family: int | None
    cpu_model_number: int | None
    stepping: int | None
    features: tuple[str, ...]  # normalised ISA feature names, sorted
    vector_bits: int | None  # widest float SIMD register implied by features
    logical_cpus: int
    physical_cores: int | None
    sockets: int | None
    numa_nodes: int | None
    usable_cpus: int  # CPUs in this process's affinity mask
    caches: tuple[CacheLevel, ...]
    mem_total_bytes: int | None
    mem_available_bytes: int | None
    nominal_hz: float | None  # advertised clock
    max_hz: float | None  # cpufreq's highest clock
    governor: str | None
    virtual: bool | None
    hypervisor: str | None
    kernel: str
    python: str
    numpy: str | None
    numba: str | None
    blas: tuple[dict[str, Any], ...]
    load_average: tuple[float, float, float] | None
    warnings: tuple[str, ...]  # one line per fact that could not be read

    def fingerprint(self) -> str:
        """Hash of the hardware fields only: same hardware, same fingerprint, whatever the load or versions."""
        d = self.to_dict()
        hw = {k: d[k] for k in HARDWARE_FIELDS}
        hw["mem_total_gib"] = None if self.mem_total_bytes is None else round(self.mem_total_bytes / 2**30)
        blob = json.dumps(hw, sort_keys=True, separators=(",", ":"))
        return hashlib.sha256(blob.encode()).hexdigest()[:16]

    def host_key(self) -> str:
        """Hostname plus hardware: the same machine with other hardware becomes another host."""
        return f"{self.hostname}-{self.fingerprint()[:8]}"

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON types only (tuples become lists)."""
        return json.loads(json.dumps(dataclasses.asdict(self)))

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> HostFacts:
        """Inverse of to_dict; unknown keys are ignored, a missing one is an InputError."""
        names = [f.name for f in dataclasses.fields(cls)]
        missing = [n for n in names if n not in d]
        if missing:
            raise InputError(f"host facts: missing field(s) {', '.join(missing)}")
        v = {n: d[n] for n in names}
        try:
            v["caches"] = tuple(CacheLevel(**c) for c in v["caches"])
            v["features"] = tuple(v["features"])
            v["warnings"] = tuple(v["warnings"])
            v["blas"] = tuple(dict(b) for b in v["blas"])
            if v["load_average"] is not None:
                v["load_average"] = tuple(float(x) for x in v["load_average"])
        except (TypeError, ValueError) as e:
            raise InputError(f"host facts: bad caches/features/blas/load_average field: {e}") from None
        return cls(**v)

    def cache(self, level: int) -> CacheLevel | None:
        """The data (or unified) cache of this level, if the host has one."""
        return next((c for c in self.caches if c.level == level and c.kind != "instruction"), None)

    def last_level_cache(self) -> CacheLevel | None:
        """The highest-level data (or unified) cache, usually the one shared by a socket."""
        data = [c for c in self.caches if c.kind != "instruction"]
        return max(data, key=lambda c: c.level) if data else None

    def socket_cache_bytes(self) -> int | None:
        """Every data cache instance of one socket added up (L1d, L2, L3 ...): what a DRAM working set must dwarf.

        L1d counts too: on an exclusive hierarchy its lines are in no other level, and it changes the
        sum by a few percent at most. Instances per socket are the host's divided by its sockets (one
        socket when unknown: a larger sum, never a smaller); without instance counts, the CPUs of a
        socket divided by the CPUs sharing one instance; without either, one instance."""
        data = [c for c in self.caches if c.kind != "instruction"]
        if not data:
            return None
        sockets = max(1, self.sockets or 1)
        total = 0
        for c in data:
            if c.instances:
                per_socket = -(-c.instances // sockets)
            elif c.shared_cpus:
                per_socket = max(1, self.logical_cpus // sockets // c.shared_cpus)
            else:
                per_socket = 1
            total += c.size_bytes * per_socket
        return total


# ---------------------------------------------------------------- pure parsers on text


def parse_cpu_list(text: str) -> tuple[int, ...]:
    """The kernel's CPU list format, "0-3,8,10-11" -> (0, 1, 2, 3, 8, 10, 11)."""
    cpus: set[int] = set()
    for part in text.strip().split(","):
        if not part:
            continue
        m = re.fullmatch(r"(\d+)(?:-(\d+))?", part.strip())
        if not m:
            raise ValueError(f"bad CPU list {text.strip()!r}")
        lo = int(m.group(1))
        hi = int(m.group(2)) if m.group(2) else lo
        if hi < lo:
            raise ValueError(f"bad CPU range {part!r}")
        cpus.update(range(lo, hi + 1))
    return tuple(sorted(cpus))


def parse_size(text: str) -> int:
    """A sysfs or cpuinfo size, "48K", "2048K", "1M", "491520 KB", "512" -> bytes."""
    m = re.fullmatch(r"\s*(\d+)\s*([KMG]?)i?B?\s*", text, re.IGNORECASE)
    if not m:
        raise ValueError(f"bad size {text.strip()!r}")
    return int(m.group(1)) * 1024 ** " KMG".index(m.group(2).upper() or " ")


def parse_cpuinfo(text: str) -> dict[str, Any]:
    """/proc/cpuinfo (x86 or Arm) -> vendor, model, family/model/stepping, flags, clocks, counts."""
    blocks = []
    for chunk in re.split(r"\n\s*\n", text):
        block = {}
        for line in chunk.splitlines():
            key, sep, value = line.partition(":")
            if sep:
                block[key.strip()] = value.strip()
        if "processor" in block:
            blocks.append(block)
    if not blocks:
        raise ValueError("no 'processor' entry")
    first = blocks[0]
    out: dict[str, Any] = dict.fromkeys(
        ("vendor", "model", "cpu_family", "cpu_model_number", "stepping", "advertised_hz", "mhz",
         "cache_size_bytes", "physical_cores", "sockets"))
    out["processors"] = len(blocks)
    out["flags"] = tuple((first.get("flags") or first.get("Features") or "").split())
    if "vendor_id" in first:
        out["vendor"] = X86_VENDORS.get(first["vendor_id"], first["vendor_id"])
    if "model name" in first:
        out["model"] = re.sub(r"\s+", " ", first["model name"])
        m = re.search(r"@\s*([\d.]+)\s*([GM])Hz", first["model name"])
        if m:
            out["advertised_hz"] = float(m.group(1)) * (1e9 if m.group(2) == "G" else 1e6)
    if "CPU implementer" in first:
        impl, part = int(first["CPU implementer"], 0), int(first.get("CPU part", "0"), 0)
        out["vendor"] = ARM_IMPLEMENTERS.get(impl, f"implementer {impl:#x}")
        out["model"] = ARM_PARTS.get((impl, part), f"part {part:#x}")
        if "CPU variant" in first and "CPU revision" in first:
            out["model"] += f" r{int(first['CPU variant'], 0)}p{int(first['CPU revision'], 0)}"
    for key, name in (("cpu family", "cpu_family"), ("model", "cpu_model_number"), ("stepping", "stepping")):
        if first.get(key, "").isdigit():
            out[name] = int(first[key])
    if "cpu MHz" in first:
        out["mhz"] = float(first["cpu MHz"])
    if "cache size" in first:
        out["cache_size_bytes"] = parse_size(first["cache size"])
    if all("physical id" in b and "core id" in b for b in blocks):
        out["physical_cores"] = len({(b["physical id"], b["core id"]) for b in blocks})
        out["sockets"] = len({b["physical id"] for b in blocks})
    return out


def parse_meminfo(text: str) -> dict[str, int]:
    """/proc/meminfo -> {"MemTotal": bytes, ...}; counts without a unit stay counts."""
    out = {}
    for line in text.splitlines():
        m = re.fullmatch(r"(\S+):\s+(\d+)(?:\s+kB)?\s*", line)
        if m:
            out[m.group(1)] = int(m.group(2)) * (1024 if line.rstrip().endswith("kB") else 1)
    return out


def parse_allowed_cpus(status: str) -> tuple[int, ...]:
    """/proc/<pid>/status -> the CPUs of its Cpus_allowed_list line."""
    m = re.search(r"^Cpus_allowed_list:\s*(\S*)", status, re.MULTILINE)
    if not m:
        raise ValueError("no Cpus_allowed_list line")
    return parse_cpu_list(m.group(1))


def parse_loadavg(text: str) -> tuple[float, float, float]:
    """/proc/loadavg -> the 1, 5 and 15 minute load averages."""
    parts = text.split()
    if len(parts) < 3:
        raise ValueError(f"bad loadavg {text.strip()!r}")
    return float(parts[0]), float(parts[1]), float(parts[2])


def parse_cache_dir(files: Mapping[str, str], instances: int | None = None) -> CacheLevel:
    """The files of one sysfs cache/indexN directory ({"level": "1", "type": "Data", ...}) -> CacheLevel."""
    kind = files["type"].strip().lower()
    if kind not in ("data", "instruction", "unified"):
        raise ValueError(f"bad cache type {files['type'].strip()!r}")
    line = files.get("coherency_line_size")
    shared = files.get("shared_cpu_list")
    return CacheLevel(level=int(files["level"]), kind=kind, size_bytes=parse_size(files["size"]),
                      line_bytes=int(line) if line and line.strip() else None,
                      shared_cpus=len(parse_cpu_list(shared)) if shared is not None else None,
                      instances=instances)


def normalise_features(flags: Iterable[str]) -> tuple[str, ...]:
    """Kernel flag names -> the sorted ISA features that decide which kernels can run."""
    names = {FEATURE_ALIASES.get(f.lower(), f.lower()) for f in flags}
    return tuple(sorted(names & (X86_FEATURES | ARM_FEATURES)))


def vector_bits_of(features: Iterable[str], sve_bytes: int | None) -> int | None:
    """Widest float SIMD register the features imply; SVE needs the kernel's vector length."""
    f = set(features)
    if "sve" in f:
        return sve_bytes * 8 if sve_bytes else None
    if "avx512f" in f:
        return 512
    if "avx" in f:
        return 256
    if f & {"sse", "sse2", "asimd"}:
        return 128
    return None


def hypervisor_of(dmi_text: str) -> str | None:
    """DMI sys_vendor + product_name -> a hypervisor name, or None (bare-metal cloud instances too)."""
    text = " ".join(dmi_text.lower().split())
    if text.endswith(".metal"):
        return None
    return next((name for key, name in DMI_HYPERVISORS if key in text), None)


# ---------------------------------------------------------------- probes on a (possibly fake) root


class _Probe:
    """Reads files under a root; never raises, notes why a fact is missing."""

    def __init__(self, root: str):
        self.root = os.path.abspath(root)
        self.live = self.root == os.path.abspath(os.sep)
        self.why: dict[str, str] = {}
        self.notes: list[str] = []

    def read(self, rel: str) -> str | None:
        try:
            with open(os.path.join(self.root, rel), encoding="utf-8", errors="replace") as f:
                return f.read().strip()
        except OSError:
            return None

    def parsed(self, rel: str, parse, field: str):
        """parse(text of rel), or None with the reason kept for `field`."""
        text = self.read(rel)
        if text is None:
            self.why.setdefault(field, f"cannot read {rel}")
            return None
        try:
            return parse(text)
        except (ValueError, KeyError) as e:
            self.why.setdefault(field, f"{rel}: {e}")
            return None

    def listdir(self, rel: str, pattern: str) -> list[str]:
        try:
            names = os.listdir(os.path.join(self.root, rel))
        except OSError:
            return []
        return sorted((n for n in names if re.fullmatch(pattern, n)), key=lambda n: int(re.sub(r"\D", "", n)))

    def live_or_file(self, field: str, live_fn, rel: str) -> str:
        """A process fact on the live root, else the root's file; falls back to this process with a note."""
        text = None if self.live else self.read(rel)
        if text:
            return text
        if not self.live:
            self.notes.append(f"{field}: cannot read {rel}; used this process's value")
        return live_fn()


def _caches(p: _Probe, cpus: tuple[int, ...]) -> tuple[CacheLevel, ...]:
    out = []
    for index in p.listdir(f"{SYS_CPU}/cpu0/cache", r"index\d+"):
        files = {name: p.read(f"{SYS_CPU}/cpu0/cache/{index}/{name}")
                 for name in ("level", "type", "size", "coherency_line_size", "shared_cpu_list")}
        files = {k: v for k, v in files.items() if v is not None}
        lists = {p.read(f"{SYS_CPU}/cpu{c}/cache/{index}/shared_cpu_list") for c in cpus} - {None}
        try:
            out.append(parse_cache_dir(files, instances=len(lists) or None))
        except (KeyError, ValueError) as e:
            p.notes.append(f"caches: skipped {SYS_CPU}/cpu0/cache/{index}: {e!r}")
    return tuple(sorted(out, key=lambda c: (c.level, c.kind)))


def _topology(p: _Probe, cpus: tuple[int, ...]) -> tuple[int | None, int | None]:
    """(physical cores, sockets) from sysfs topology: distinct sibling sets and package ids."""
    cores, packages = set(), set()
    for c in cpus:
        t = f"{SYS_CPU}/cpu{c}/topology"
        siblings = p.read(f"{t}/thread_siblings_list") or p.read(f"{t}/core_cpus_list")
        package = p.read(f"{t}/physical_package_id")
        if siblings is None or package is None:
            p.why.setdefault("physical_cores", f"cannot read {t}")
            p.why.setdefault("sockets", f"cannot read {t}")
            return None, None
        cores.add(siblings)
        packages.add(package)
    return len(cores), len(packages)


def _hypervisor(p: _Probe, x86_flags: tuple[str, ...] | None) -> tuple[bool | None, str | None]:
    """(virtual, hypervisor name): x86's 'hypervisor' flag decides; otherwise DMI and clock sources hint."""
    dmi = [p.read(f"sys/class/dmi/id/{n}") for n in ("sys_vendor", "product_name")]
    name = (p.read("sys/hypervisor/type")
            or hypervisor_of(" ".join(t for t in dmi if t))
            or next((CLOCKSOURCE_HYPERVISORS[c] for c in
                     (p.read("sys/devices/system/clocksource/clocksource0/available_clocksource") or "").split()
                     if c in CLOCKSOURCE_HYPERVISORS), None))
    if x86_flags:  # CPUID's hypervisor bit, which every x86 hypervisor sets
        virtual = "hypervisor" in x86_flags
    elif name is not None:
        virtual = True
    elif any(dmi):
        virtual = False
    else:
        p.why["virtual"] = p.why["hypervisor"] = "no x86 hypervisor flag, /sys/hypervisor/type or DMI to tell"
        return None, None
    p.why["hypervisor"] = "virtual, but no name in /sys/hypervisor/type, DMI or clock sources"
    return virtual, (name if virtual else None)


def _usable_cpus(p: _Probe, logical_cpus: int) -> int:
    """This process's affinity on the live root, else the root's proc/self/status; else every CPU."""
    if p.live and hasattr(os, "sched_getaffinity"):
        return len(os.sched_getaffinity(0))
    allowed = p.parsed("proc/self/status", parse_allowed_cpus, "usable_cpus")
    if allowed:
        return len(allowed)
    p.notes.append(f"usable_cpus: {p.why.get('usable_cpus', 'empty Cpus_allowed_list')}; assumed all {logical_cpus}")
    return logical_cpus


def _khz_to_hz(text: str) -> float:
    return float(text) * 1e3  # cpufreq files are in kHz


@functools.lru_cache(maxsize=1)
def _cpuinfo_library() -> dict[str, Any]:
    """py-cpuinfo's report; slow (it starts a subprocess), so a last resort, once per process."""
    try:
        import cpuinfo

        return cpuinfo.get_cpu_info()
    except Exception:  # noqa: BLE001 -- a third-party probe: any failure means "no answer"
        return {}


def _blas(p: _Probe) -> tuple[dict[str, Any], ...]:
    try:
        import numpy  # noqa: F401 -- loads the BLAS so threadpoolctl can see it
        from threadpoolctl import threadpool_info

        found = tuple({k: e.get(k) for k in BLAS_KEYS} for e in threadpool_info() if e.get("user_api") == "blas")
    except Exception as e:  # noqa: BLE001 -- a third-party probe: any failure means "no answer"
        p.notes.append(f"blas: threadpoolctl failed: {e!r}")
        return ()
    if not found:
        p.notes.append("blas: threadpoolctl found no BLAS loaded")
    return found


def _version(module: str) -> str | None:
    if module in sys.modules:
        return getattr(sys.modules[module], "__version__", None)
    try:
        from importlib.metadata import version

        return version(module)
    except Exception:  # noqa: BLE001 -- not installed
        return None


def collect_host_facts(root: str = "/") -> HostFacts:
    """Read every platform fact once; a fact that cannot be read is None plus a line in `warnings`."""
    p = _Probe(root)
    cpu = p.parsed("proc/cpuinfo", parse_cpuinfo, "cpuinfo") or {}
    if not cpu and p.live:  # no /proc (not Linux): ask py-cpuinfo
        lib = _cpuinfo_library()
        cpu = {"vendor": lib.get("vendor_id_raw"), "model": lib.get("brand_raw"), "flags": tuple(lib.get("flags", ())),
               "cpu_family": lib.get("family"), "cpu_model_number": lib.get("model"), "stepping": lib.get("stepping")}
    for f in ("vendor", "model", "cpu_family", "cpu_model_number", "stepping"):
        p.why[f] = p.why.get("cpuinfo", "not in proc/cpuinfo")

    arch = p.live_or_file("arch", platform.machine, "proc/sys/kernel/arch")
    features = normalise_features(cpu.get("flags", ()))
    if not features:
        p.notes.append(f"features: none found ({p.why.get('cpuinfo', 'no known flag in proc/cpuinfo')})")
    sve_bytes = p.parsed("proc/sys/abi/sve_default_vector_length", int, "vector_bits") if "sve" in features else None
    vector_bits = vector_bits_of(features, sve_bytes)
    p.why.setdefault("vector_bits", "no SIMD feature known")

    cpus = p.parsed(f"{SYS_CPU}/online", parse_cpu_list, "logical_cpus")
    if not cpus:
        n = cpu.get("processors") or os.cpu_count() or 1
        p.notes.append(f"logical_cpus: {p.why.get('logical_cpus', 'empty online list')}; counted {n} another way")
        cpus = tuple(range(n))
    physical_cores, sockets = _topology(p, cpus)
    physical_cores = physical_cores or cpu.get("physical_cores")
    sockets = sockets or cpu.get("sockets")
    nodes = p.listdir("sys/devices/system/node", r"node\d+")
    p.why["numa_nodes"] = "no sys/devices/system/node/node*"

    caches = _caches(p, cpus)
    if not caches:
        size = cpu.get("cache_size_bytes")
        level = 2 if cpu.get("vendor") in ("AMD", "Hygon") else 3  # what that line describes (from memory)
        if size:
            caches = (CacheLevel(level, "unified", size, None, None, None),)
        p.notes.append(f"caches: no {SYS_CPU}/cpu0/cache/index*"
                       + (f"; only L{level} from proc/cpuinfo 'cache size'" if size else ""))

    usable = _usable_cpus(p, len(cpus))

    mem = p.parsed("proc/meminfo", parse_meminfo, "mem_total_bytes") or {}
    p.why.setdefault("mem_available_bytes", p.why.get("mem_total_bytes", "no MemAvailable in proc/meminfo"))
    p.why.setdefault("mem_total_bytes", "no MemTotal in proc/meminfo")
    load = p.parsed("proc/loadavg", parse_loadavg, "load_average")

    freq = f"{SYS_CPU}/cpu0/cpufreq"
    # Advertised clock: the model name's "@ 2.60GHz", else intel_pstate's base clock, else cpuinfo's
    # "cpu MHz" (the current clock; in a VM usually the host's nominal one).
    nominal = cpu.get("advertised_hz") or p.parsed(f"{freq}/base_frequency", _khz_to_hz, "nominal_hz")
    nominal = nominal or (cpu["mhz"] * 1e6 if cpu.get("mhz") else None)
    if nominal is None and p.live:
        nominal = (_cpuinfo_library().get("hz_advertised") or [None])[0] or None
    p.why["nominal_hz"] = "no '@ GHz' in the model name, no base_frequency, no 'cpu MHz'"
    max_hz = p.parsed(f"{freq}/cpuinfo_max_freq", _khz_to_hz, "max_hz")
    governor = p.parsed(f"{freq}/scaling_governor", str, "governor")
    is_x86 = re.fullmatch(r"x86_64|i[3-6]86|amd64|AMD64", arch) is not None
    virtual, hypervisor = _hypervisor(p, cpu.get("flags") if is_x86 else None)

    if p.live:  # psutil covers hosts without /proc
        import psutil

        if not mem:
            vm = psutil.virtual_memory()
            mem = {"MemTotal": vm.total, "MemAvailable": vm.available}
        physical_cores = physical_cores or psutil.cpu_count(logical=False)
        load = load or tuple(psutil.getloadavg())

    facts = dict(
        hostname=p.live_or_file("hostname", socket.gethostname, "proc/sys/kernel/hostname"),
        vendor=cpu.get("vendor"), model=cpu.get("model"), arch=arch,
        cpu_family=cpu.get("cpu_family"), cpu_model_number=cpu.get("cpu_model_number"), stepping=cpu.get("stepping"),
        features=features, vector_bits=vector_bits, logical_cpus=len(cpus), physical_cores=physical_cores,
        sockets=sockets, numa_nodes=len(nodes) or None, usable_cpus=usable, caches=caches,
        mem_total_bytes=mem.get("MemTotal"), mem_available_bytes=mem.get("MemAvailable"),
        nominal_hz=nominal, max_hz=max_hz, governor=governor, virtual=virtual, hypervisor=hypervisor,
        kernel=p.live_or_file("kernel", platform.release, "proc/sys/kernel/osrelease"),
        python=platform.python_version(), numpy=_version("numpy"), numba=_version("numba"),
        blas=_blas(p), load_average=load)
    p.why.update(numpy="numpy is not installed", numba="numba is not installed")
    not_applicable = set()
    if not is_x86:
        not_applicable |= {"cpu_family", "cpu_model_number", "stepping"}
    if virtual is False:
        not_applicable.add("hypervisor")
    warnings = [f"{k}: {p.why.get(k, 'not found')}" for k, v in facts.items()
                if v is None and k not in not_applicable]
    return HostFacts(**facts, warnings=tuple(warnings + p.notes))
