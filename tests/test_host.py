"""Host facts: parsers on captured text, whole records from fake trees, and the live machine against the OS."""

from __future__ import annotations

import dataclasses
import json
import os
import re
import shutil
from pathlib import Path

import psutil
import pytest

from eaves import host
from eaves.errors import InputError
from eaves.host import (CacheLevel, HostFacts, collect_host_facts, normalise_features, parse_allowed_cpus,
                        parse_cache_dir, parse_cpu_list, parse_cpuinfo, parse_loadavg, parse_meminfo, parse_size,
                        vector_bits_of)

FIXTURES = Path(__file__).parent / "fixtures" / "host"
GiB = 2**30


def fake_root(name: str, dest: Path, drop: str | None = None) -> str:
    """Copy a fixture's proc/ files and expand its sys.txt (`grep -r .` capture) into a tree under dest;
    sysfs paths matching the regex `drop` are left out."""
    src = FIXTURES / name
    shutil.copytree(src, dest, dirs_exist_ok=True, ignore=shutil.ignore_patterns("sys.txt"))
    for line in (src / "sys.txt").read_text().splitlines():
        if line.startswith("#"):
            continue
        path, _, value = line.partition(":")
        if drop and re.search(drop, path):
            continue
        f = dest / path
        f.parent.mkdir(parents=True, exist_ok=True)
        f.write_text(value + "\n")
    return str(dest)


def without(root: str, rel: str) -> str:
    os.remove(os.path.join(root, rel))
    return root


@pytest.fixture(scope="module")
def x86(tmp_path_factory) -> HostFacts:
    return collect_host_facts(fake_root("x86_2s32c", tmp_path_factory.mktemp("x86")))


@pytest.fixture(scope="module")
def arm(tmp_path_factory) -> HostFacts:
    return collect_host_facts(fake_root("arm_64c", tmp_path_factory.mktemp("arm")))


@pytest.fixture(scope="module")
def live() -> HostFacts:
    return collect_host_facts()


# ---------------------------------------------------------------- parsers


def test_parse_cpu_list():
    assert parse_cpu_list("0-3,8") == (0, 1, 2, 3, 8)
    assert parse_cpu_list("5\n") == (5,)
    assert parse_cpu_list("") == ()
    assert len(parse_cpu_list("0-15,32-47")) == 32
    for bad in ("a-b", "3-1", "0-3;8"):
        with pytest.raises(ValueError):
            parse_cpu_list(bad)


def test_parse_allowed_cpus():
    status = (FIXTURES / "x86_2s32c/proc/self/status").read_text()
    assert parse_allowed_cpus(status) == tuple(range(16)) + tuple(range(32, 48))
    with pytest.raises(ValueError):
        parse_allowed_cpus("Name:\tcat\n")


def test_parse_size():
    assert parse_size("48K") == 48 * 1024
    assert parse_size("491520 KB") == 491520 * 1024
    assert parse_size("1M") == 2**20
    assert parse_size("512") == 512
    with pytest.raises(ValueError):
        parse_size("lots")


def test_parse_cpuinfo_x86():
    info = parse_cpuinfo((FIXTURES / "x86_2s32c/proc/cpuinfo").read_text())
    assert (info["vendor"], info["model"]) == ("Intel", "Intel(R) Xeon(R) CPU @ 2.10GHz")
    assert (info["cpu_family"], info["cpu_model_number"], info["stepping"]) == (6, 143, 8)
    assert (info["processors"], info["physical_cores"], info["sockets"]) == (64, 32, 2)
    assert info["advertised_hz"] == pytest.approx(2.1e9)
    assert info["mhz"] == 800.0  # first processor's current clock
    assert info["cache_size_bytes"] == 30720 * 1024
    assert "hypervisor" not in info["flags"] and "pni" in info["flags"]


def test_parse_cpuinfo_arm():
    info = parse_cpuinfo((FIXTURES / "arm_64c/proc/cpuinfo").read_text())
    assert (info["vendor"], info["model"]) == ("Arm", "Neoverse-V1 r1p1")
    assert info["cpu_family"] is info["stepping"] is info["advertised_hz"] is info["mhz"] is None
    assert info["processors"] == 64 and info["physical_cores"] is None
    assert {"asimd", "sve", "bf16", "i8mm"} <= set(info["flags"])


def test_parse_cpuinfo_rejects_text_without_processors():
    with pytest.raises(ValueError):
        parse_cpuinfo("MemTotal: 1 kB\n")


def test_parse_meminfo_and_loadavg():
    mem = parse_meminfo((FIXTURES / "x86_2s32c/proc/meminfo").read_text())
    assert mem["MemTotal"] == 527433272 * 1024
    assert mem["MemAvailable"] <= mem["MemTotal"]
    assert mem["HugePages_Total"] == 0  # a count, not kB
    assert parse_loadavg("3.12 2.87 2.40 4/1211 48812\n") == (3.12, 2.87, 2.40)
    with pytest.raises(ValueError):
        parse_loadavg("")


def test_parse_cache_dir():
    files = {"level": "3", "type": "Unified", "size": "30720K", "coherency_line_size": "64",
             "shared_cpu_list": "0-15,32-47"}
    assert parse_cache_dir(files, instances=2) == CacheLevel(3, "unified", 30720 * 1024, 64, 32, 2)
    assert parse_cache_dir({"level": "1", "type": "Data", "size": "32K"}).shared_cpus is None
    with pytest.raises(ValueError):
        parse_cache_dir({**files, "type": "Trace"})


def test_normalise_features_and_vector_bits():
    f = normalise_features(["fpu", "pni", "sse2", "AVX", "hypervisor", "avx512_vnni", "avx512f"])
    assert f == ("avx", "avx512_vnni", "avx512f", "sse2", "sse3")  # kernel's "pni" is SSE3; sorted
    assert vector_bits_of(f, None) == 512
    assert vector_bits_of(["sse2", "avx", "avx2"], None) == 256
    assert vector_bits_of(["asimd"], None) == 128
    assert vector_bits_of(["asimd", "sve"], 64) == 512
    assert vector_bits_of(["asimd", "sve"], None) is None  # SVE length unknown: no guess
    assert vector_bits_of([], None) is None


# ---------------------------------------------------------------- whole records from fake trees


def test_x86_server_record(x86):
    assert (x86.hostname, x86.arch, x86.kernel) == ("kiln-07", "x86_64", "6.8.0-41-generic")
    assert (x86.vendor, x86.cpu_family, x86.cpu_model_number, x86.stepping) == ("Intel", 6, 143, 8)
    assert {"avx512f", "avx512_vnni", "avx_vnni", "amx_tile", "amx_int8", "amx_bf16", "sse3"} <= set(x86.features)
    assert list(x86.features) == sorted(x86.features)
    assert x86.vector_bits == 512
    assert (x86.logical_cpus, x86.physical_cores, x86.sockets, x86.numa_nodes) == (64, 32, 2, 2)
    assert x86.usable_cpus == 32  # Cpus_allowed_list 0-15,32-47
    assert x86.mem_total_bytes == 527433272 * 1024
    assert x86.nominal_hz == pytest.approx(2.1e9)  # the model name's clock wins over base_frequency
    assert x86.max_hz == pytest.approx(4.0e9) and x86.governor == "performance"
    assert (x86.virtual, x86.hypervisor) == (False, None)
    assert x86.load_average == (3.12, 2.87, 2.40)
    assert x86.cache(1) == CacheLevel(1, "data", 48 * 1024, 64, 2, 32)
    assert x86.cache(2) == CacheLevel(2, "unified", 2048 * 1024, 64, 2, 32)
    assert x86.last_level_cache() == CacheLevel(3, "unified", 30720 * 1024, 64, 32, 2)
    assert x86.cache(4) is None
    # every level: instances x CPUs per instance covers each logical CPU once
    assert all(c.instances * c.shared_cpus == x86.logical_cpus for c in x86.caches)
    assert [w for w in x86.warnings if not w.startswith(("numpy", "numba", "blas"))] == []


def test_arm_server_record(arm):
    assert (arm.hostname, arm.arch, arm.vendor, arm.model) == ("loft-arm-03", "aarch64", "Arm", "Neoverse-V1 r1p1")
    assert arm.cpu_family is arm.cpu_model_number is arm.stepping is None
    assert {"asimd", "asimddp", "asimdhp", "fphp", "sve", "bf16", "i8mm"} <= set(arm.features)
    assert not {"fp", "evtstrm", "aes"} & set(arm.features)
    assert arm.vector_bits == 256  # 32-byte default SVE length
    assert (arm.logical_cpus, arm.physical_cores, arm.sockets, arm.numa_nodes, arm.usable_cpus) == (64, 64, 1, 1, 64)
    assert arm.cache(1).size_bytes == 64 * 1024 and arm.cache(1).kind == "data"
    assert arm.last_level_cache() == CacheLevel(3, "unified", 32 * 2**20, 64, 64, 1)
    assert arm.max_hz == pytest.approx(2.6e9) and arm.governor == "schedutil"
    assert (arm.virtual, arm.hypervisor) == (False, None)  # DMI names no hypervisor
    # no model-name clock, base_frequency or "cpu MHz" on this Arm host, and a fake root never asks py-cpuinfo
    assert arm.nominal_hz is None
    assert [w.split(":")[0] for w in arm.warnings if not w.startswith(("numpy", "numba", "blas"))] == ["nominal_hz"]


def test_sve_without_readable_length_gives_none_and_warning(tmp_path):
    root = without(fake_root("arm_64c", tmp_path), "proc/sys/abi/sve_default_vector_length")
    facts = collect_host_facts(root)
    assert facts.vector_bits is None
    assert any(w.startswith("vector_bits:") and "sve_default_vector_length" in w for w in facts.warnings)


def test_cache_falls_back_to_cpuinfo_last_level_only(tmp_path):
    facts = collect_host_facts(fake_root("x86_2s32c", tmp_path, drop=r"/cache/"))
    assert facts.caches == (CacheLevel(3, "unified", 30720 * 1024, None, None, None),)
    assert facts.cache(1) is None and facts.last_level_cache().level == 3
    assert any(w.startswith("caches:") for w in facts.warnings)


def test_hypervisor_flag_and_clocksource(tmp_path):
    root = fake_root("x86_2s32c", tmp_path, drop=r"dmi|clocksource")
    cpuinfo = Path(root, "proc/cpuinfo")
    cpuinfo.write_text(cpuinfo.read_text().replace(" rdrand ", " rdrand hypervisor "))
    facts = collect_host_facts(root)
    assert facts.virtual is True and facts.hypervisor is None
    assert any(w.startswith("hypervisor:") for w in facts.warnings)
    src = Path(root, "sys/devices/system/clocksource/clocksource0/available_clocksource")
    src.parent.mkdir(parents=True)
    src.write_text("tsc kvm-clock \n")
    assert collect_host_facts(root).hypervisor == "kvm"


def test_empty_root_never_raises_and_warns_for_every_missing_fact(tmp_path):
    facts = collect_host_facts(str(tmp_path))
    assert facts.vendor is None and facts.features == () and facts.caches == ()
    assert facts.logical_cpus >= 1 and facts.usable_cpus >= 1
    missing = [f.name for f in dataclasses.fields(facts) if getattr(facts, f.name) is None]
    assert {"vendor", "mem_total_bytes", "nominal_hz", "max_hz", "governor", "load_average",
            "numa_nodes", "physical_cores", "virtual"} <= set(missing)
    for name in missing:
        assert any(w.startswith(f"{name}:") for w in facts.warnings), name
    for name in ("features", "caches", "logical_cpus", "hostname", "kernel", "arch"):
        assert any(w.startswith(f"{name}:") for w in facts.warnings), name


def test_unreadable_file_is_a_warning_not_an_error(tmp_path):
    root = fake_root("x86_2s32c", tmp_path)
    Path(root, "proc/loadavg").write_text("not numbers\n")
    os.remove(os.path.join(root, "proc/meminfo"))
    os.mkdir(os.path.join(root, "proc/meminfo"))  # reading a directory fails like a permission error would
    facts = collect_host_facts(root)
    assert facts.load_average is None and facts.mem_total_bytes is None
    assert any(w.startswith("load_average:") for w in facts.warnings)
    assert any(w.startswith("mem_total_bytes:") for w in facts.warnings)


# ---------------------------------------------------------------- record behaviour


def test_round_trip_through_json(x86, arm):
    for facts in (x86, arm):
        d = json.loads(json.dumps(facts.to_dict()))
        assert d == facts.to_dict()
        assert HostFacts.from_dict(d) == facts
        assert HostFacts.from_dict(d).fingerprint() == facts.fingerprint()


def test_from_dict_names_missing_and_bad_fields(x86):
    d = x86.to_dict()
    del d["caches"]
    with pytest.raises(InputError, match="caches"):
        HostFacts.from_dict(d)
    with pytest.raises(InputError, match="caches"):
        HostFacts.from_dict({**x86.to_dict(), "caches": [{"level": 1}]})


def test_fingerprint_follows_hardware_only(x86, arm):
    assert re.fullmatch(r"[0-9a-f]{16}", x86.fingerprint())
    assert x86.host_key() == f"kiln-07-{x86.fingerprint()[:8]}"
    same = dataclasses.replace(x86, hostname="kiln-08", load_average=(0.0, 0.0, 0.0), governor="powersave",
                               mem_available_bytes=1, numpy="0.0", blas=(), usable_cpus=1, warnings=("x",),
                               mem_total_bytes=x86.mem_total_bytes + 100 * 2**20)
    assert same.fingerprint() == x86.fingerprint()
    assert same.host_key() != x86.host_key()  # other hostname, other key
    less_memory = dataclasses.replace(x86, mem_total_bytes=x86.mem_total_bytes - 64 * GiB)
    other_cpu = dataclasses.replace(x86, model="Intel(R) Xeon(R) CPU @ 2.40GHz", stepping=6)
    smaller_l3 = dataclasses.replace(x86, caches=x86.caches[:-1] + (dataclasses.replace(x86.caches[-1],
                                                                                       size_bytes=2**24),))
    keys = {f.host_key() for f in (x86, less_memory, other_cpu, smaller_l3)}
    assert len(keys) == 4
    assert arm.fingerprint() != x86.fingerprint()


def _socket_caches_in_capture(name: str, package: str = "0") -> int:
    """Independent of eaves.host: in a sysfs capture, the distinct shared_cpu_list of every data or unified
    cache/indexN among the CPUs whose topology/physical_package_id is `package` (Linux sysfs cacheinfo and
    topology), each instance counted at its size."""
    lines = (FIXTURES / name / "sys.txt").read_text().splitlines()
    files = dict(line.split(":", 1) for line in lines if not line.startswith("#"))
    cpu = "sys/devices/system/cpu"
    in_package = {p.split("/")[4] for p, v in files.items() if p.endswith("/physical_package_id") and v == package}
    instances: dict[str, set[str]] = {}
    for path, value in files.items():
        parts = path.split("/")  # sys/devices/system/cpu/cpuN/cache/indexM/shared_cpu_list
        if path.endswith("/shared_cpu_list") and "/cache/" in path and parts[4] in in_package:
            index = parts[6]
            if files[f"{cpu}/cpu0/cache/{index}/type"] != "Instruction":
                instances.setdefault(index, set()).add(value)
    sizes = {index: files[f"{cpu}/cpu0/cache/{index}/size"] for index in instances}
    assert all(v.endswith("K") for v in sizes.values())  # sysfs prints cache sizes in KiB
    return sum(len(lists) * int(sizes[index][:-1]) * 1024 for index, lists in instances.items())


def test_socket_cache_bytes_adds_every_data_cache_instance_of_one_socket(x86, arm):
    for facts, name in ((x86, "x86_2s32c"), (arm, "arm_64c")):
        assert facts.socket_cache_bytes() == _socket_caches_in_capture(name)
    # the two sockets of the x86 capture are alike: socket 1 counts the same
    assert x86.socket_cache_bytes() == _socket_caches_in_capture("x86_2s32c", package="1")
    # one socket, not the host: the x86 host's L3 instances are two, its socket's one
    assert x86.socket_cache_bytes() < sum(c.size_bytes * c.instances for c in x86.caches if c.kind != "instruction")
    # the Zen 4 guest of tests/fixtures/zen4-kvm-2cpu (its README: L1d 32 KiB and L2 1 MiB per core, L3 32 MiB
    # shared by both vCPUs, one socket, as sysfs reported them)
    zen4 = json.loads((FIXTURES.parent / "zen4-kvm-2cpu" / "quick-memory.json").read_text())["host"]
    assert HostFacts.from_dict(zen4).socket_cache_bytes() == 2 * 32 * 1024 + 2 * 2**20 + 32 * 2**20
    assert dataclasses.replace(x86, caches=()).socket_cache_bytes() is None


# ---------------------------------------------------------------- the live machine against the OS's own reports


def _sysfs_cache_size(level: int, kinds: set[str]) -> int | None:
    """Independent read of Linux sysfs cacheinfo (/sys/devices/system/cpu/cpu0/cache/index*/{level,type,size})."""
    base = "/sys/devices/system/cpu/cpu0/cache"
    for index in os.listdir(base):
        if not index.startswith("index"):
            continue
        read = lambda n: open(f"{base}/{index}/{n}").read().strip()  # noqa: E731
        if int(read("level")) == level and read("type") in kinds:
            size = read("size")
            assert size.endswith("K")  # sysfs prints cache sizes in KiB
            return int(size[:-1]) * 1024
    return None


@pytest.mark.skipif(not os.path.isdir("/sys/devices/system/cpu/cpu0/cache"), reason="no sysfs cacheinfo")
def test_live_caches_match_sysfs(live):
    for level in (1, 2):
        expected = _sysfs_cache_size(level, {"Data", "Unified"})
        got = live.cache(level)
        assert (got.size_bytes if got else None) == expected


def test_live_counts_and_memory_match_os(live):
    assert live.logical_cpus == os.cpu_count()  # Python's count of online CPUs
    if hasattr(os, "sched_getaffinity"):
        assert live.usable_cpus == len(os.sched_getaffinity(0)) <= live.logical_cpus
    # psutil reads total memory on its own (MemTotal via its own parser, or sysctl)
    assert live.mem_total_bytes == pytest.approx(psutil.virtual_memory().total, rel=0.01)
    assert 0 < live.mem_available_bytes <= live.mem_total_bytes
    if live.physical_cores and psutil.cpu_count(logical=False):
        assert live.physical_cores == psutil.cpu_count(logical=False)
    assert live.fingerprint() == collect_host_facts().fingerprint()  # load moved, hardware did not


def test_live_blas_is_seen(live):
    # numpy's wheels link a BLAS (common practice), and threadpoolctl reports it once numpy is loaded
    assert live.blas and all(b["internal_api"] and b["num_threads"] >= 1 for b in live.blas)
    assert live.numpy


def test_live_does_not_call_py_cpuinfo_when_proc_has_a_clock(monkeypatch):
    try:
        info = parse_cpuinfo(open("/proc/cpuinfo").read())
    except OSError:
        pytest.skip("no /proc/cpuinfo")
    if not (info["advertised_hz"] or info["mhz"]):
        pytest.skip("this host's /proc/cpuinfo names no clock")

    def refuse():
        raise AssertionError("py-cpuinfo called although /proc/cpuinfo had a clock")

    monkeypatch.setattr(host, "_cpuinfo_library", refuse)
    assert collect_host_facts().nominal_hz > 0
