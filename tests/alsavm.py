"""A small virtual machine with an ALSA sequencer, for running retuner's ALSA backend for real on a
host whose own kernel has none (a container, a micro-VM guest).

:func:`run` boots ``qemu-system-x86_64`` with the host's Debian kernel (``/boot/vmlinuz-VERSION``,
package linux-image-amd64) and an initramfs built here each time: a static busybox (package
busybox-static), an ``init`` script, and the kernel modules it loads (``/lib/modules/VERSION``,
dependencies first as ``modules.dep`` lists them): virtio PCI and 9p to reach the host's files,
overlayfs, and the ALSA sequencer with its dummy client (``snd-seq-dummy``, whose "Midi Through"
port every ALSA sequencer with that module shows). The host's root directory is shared read-only
(``-virtfs``, 9p) and laid under a tmpfs (overlayfs), so the guest sees the host's files, the venv
and the checkout at their own paths and may write anywhere without touching the host. A second
share, writable, is the folder where the command's standard output, standard error and exit status
come back. ``init`` mounts ``/proc``, ``/sys``, ``/dev`` (devtmpfs: ``/dev/snd/seq`` appears when
the sequencer module loads), ``/dev/pts``, ``/dev/shm`` and ``/run``, runs ONE command chrooted
into that root, and powers off.

KVM is used when ``/dev/kvm`` opens, else QEMU's TCG emulation (slower, same result). Nothing is
skipped: a missing qemu, kernel, module or busybox raises :class:`VMError` saying which package
to install.
"""

from __future__ import annotations

import os
import shlex
import shutil
import stat
import subprocess
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Mapping, Optional, Sequence

# what init loads, by module name; their dependencies come from modules.dep
MODULES = ("virtio_pci", "9pnet_virtio", "9p", "overlay", "snd-seq", "snd-seq-dummy")
PACKAGES = "qemu-system-x86 linux-image-amd64 busybox-static"   # what to install when one is missing
ROOT_TAG = "hostroot"
OUT_TAG = "result"
ACCEL_VARIABLE = "RETUNER_TEST_VM_ACCEL"     # kvm or tcg, to choose instead of the rule of kvm_usable()


class VMError(RuntimeError):
    """Something the virtual machine needs is not there, or the machine did not finish."""


@dataclass
class Result:
    returncode: int          # the command's exit status inside the machine
    stdout: str
    stderr: str
    console: str             # the machine's serial console (the kernel's and init's messages)
    seconds: float           # from starting qemu until it exited
    accel: str               # "kvm" or "tcg"


def kvm_usable() -> bool:
    """Whether KVM can run the host's kernel at full speed: ``/dev/kvm`` opens and the host's KVM is
    the hardware-assisted one (module kvm_intel or kvm_amd). A paravirtual KVM (kvm_pvm, as in some
    micro-VM guests) also opens ``/dev/kvm`` but runs only kernels built as its guests: the Debian
    kernel crawled there (no console line within 300 s, where TCG booted in 3 s), so it counts as no
    KVM."""
    if not any(os.path.isdir(f"/sys/module/{m}") for m in ("kvm_intel", "kvm_amd")):
        return False
    try:
        fd = os.open("/dev/kvm", os.O_RDWR | os.O_CLOEXEC)
    except OSError:
        return False
    os.close(fd)
    return True


def qemu(path: Optional[str] = None) -> str:
    """The qemu-system-x86_64 program (``path`` is a PATH to search, default the environment's)."""
    found = shutil.which("qemu-system-x86_64", path=path)
    if found is None:
        raise VMError(f"qemu-system-x86_64 is not installed (apt-get install {PACKAGES})")
    return found


def kernel(boot: str = "/boot", modules: str = "/lib/modules") -> tuple[Path, str]:
    """The newest kernel under ``boot`` that has its modules under ``modules``: (image, version)."""
    found = []
    for image in Path(boot).glob("vmlinuz-*"):
        version = image.name[len("vmlinuz-"):]
        if (Path(modules) / version / "modules.dep").is_file():
            found.append((image.stat().st_mtime, version, image))
    if not found:
        raise VMError(f"no kernel image with its modules ({boot}/vmlinuz-VERSION and "
                      f"{modules}/VERSION/modules.dep; apt-get install {PACKAGES})")
    _, version, image = max(found)
    if not os.access(image, os.R_OK):
        raise VMError(f"{image} is not readable by this user")
    return image, version


def _module_name(path: str) -> str:
    base = os.path.basename(path)
    for ext in (".ko", ".ko.xz", ".ko.zst", ".ko.gz"):
        if base.endswith(ext):
            base = base[: -len(ext)]
    return base.replace("-", "_")


def load_order(version: str, wanted: Sequence[str] = MODULES, modules: str = "/lib/modules") -> list[Path]:
    """The module files for ``wanted`` and everything they depend on, each after its dependencies
    (``modules.dep``: ``path: dependency dependency ...``, paths relative to the version's folder);
    modules built into the kernel (``modules.builtin``) need no file."""
    top = Path(modules) / version
    deps: dict[str, tuple[str, list[str]]] = {}
    for line in (top / "modules.dep").read_text().splitlines():
        if ":" not in line:
            continue
        path, rest = line.split(":", 1)
        deps[_module_name(path)] = (path, rest.split())
    builtin = set()
    if (top / "modules.builtin").is_file():
        builtin = {_module_name(p) for p in (top / "modules.builtin").read_text().split()}
    order: list[str] = []

    def visit(name: str, chain: tuple[str, ...]) -> None:
        if name in order or name in builtin:
            return
        if name not in deps:
            raise VMError(f"kernel {version} has no module {name} (modules.dep)")
        if name in chain:
            raise VMError(f"modules.dep has a cycle: {' -> '.join(chain + (name,))}")
        for dep in deps[name][1]:
            visit(_module_name(dep), chain + (name,))
        order.append(name)

    for name in wanted:
        visit(name.replace("-", "_"), ())
    files = [top / deps[n][0] for n in order]
    for f in files:
        if f.suffix != ".ko":
            raise VMError(f"{f} is compressed: busybox insmod loads plain .ko files only")
    return files


def newc(entries: Sequence[tuple[str, int, bytes]]) -> bytes:
    """A cpio archive in the "new ASCII" format the kernel unpacks as an initramfs
    (Documentation/driver-api/early-userspace/buffer-format.rst): ``(name, mode, data)`` each,
    directories with an empty body, then the ``TRAILER!!!`` entry."""
    out = bytearray()

    def pad():
        out.extend(b"\0" * (-len(out) % 4))

    for ino, (name, mode, data) in enumerate([*entries, ("TRAILER!!!", 0, b"")], start=1):
        raw = name.encode() + b"\0"
        fields = [ino, mode, 0, 0, 1, 0, len(data), 0, 0, 0, 0, len(raw), 0]
        out += b"070701" + b"".join(b"%08X" % f for f in fields) + raw
        pad()
        out += data
        pad()
    return bytes(out)


def init_script(modules: Sequence[str], out_dir: str) -> str:
    """The guest's /init: modules, the shared root under a tmpfs, the command, power off."""
    new = "/newroot"
    out = shlex.quote(new + out_dir)
    loads = "\n".join(f"insmod /modules/{os.path.basename(m)} || fail 'insmod {os.path.basename(m)}'"
                      for m in modules)
    return f"""#!/bin/busybox sh
/bin/busybox --install -s /bin
export PATH=/bin
fail() {{ echo "vm-init: $*"; poweroff -f; }}
mkdir -p /proc /sys /dev /host /rw {new}
mount -t proc proc /proc
mount -t sysfs sysfs /sys
mount -t devtmpfs devtmpfs /dev
{loads}
mount -t 9p -o trans=virtio,version=9p2000.L,msize=512000,cache=loose,ro {ROOT_TAG} /host || fail 'mount {ROOT_TAG}'
mount -t tmpfs -o mode=0755 tmpfs /rw
mkdir -p /rw/upper /rw/work
mount -t overlay -o lowerdir=/host,upperdir=/rw/upper,workdir=/rw/work overlay {new} || fail 'mount overlay'
mount -t proc proc {new}/proc
mount -t sysfs sysfs {new}/sys
mount -t devtmpfs devtmpfs {new}/dev
mkdir -p {new}/dev/pts {new}/dev/shm {new}/run
mount -t devpts devpts {new}/dev/pts
mount -t tmpfs tmpfs {new}/dev/shm
mount -t tmpfs tmpfs {new}/run
mkdir -p {out}
mount -t 9p -o trans=virtio,version=9p2000.L,msize=512000 {OUT_TAG} {out} || fail 'mount {OUT_TAG}'
[ -e /dev/snd/seq ] || echo "vm-init: no /dev/snd/seq"
echo "vm-init: running the command"
chroot {new} /bin/sh {shlex.quote(out_dir)}/command.sh > {out}/stdout 2> {out}/stderr
echo $? > {out}/returncode
sync
echo "vm-init: done"
poweroff -f
"""


def initramfs(version: str, out_dir: str, busybox: Optional[str] = None) -> bytes:
    """The initramfs for one run (its init knows where the results go)."""
    bb = busybox or shutil.which("busybox") or "/bin/busybox"
    if not os.path.isfile(bb):
        raise VMError(f"busybox is not installed (apt-get install {PACKAGES})")
    probe = subprocess.run(["file", "-L", bb], capture_output=True, text=True) if shutil.which("file") else None
    if probe is not None and "dynamically linked" in probe.stdout:
        raise VMError(f"{bb} is linked dynamically: the initramfs needs busybox-static")
    mods = load_order(version)
    entries = [("bin", stat.S_IFDIR | 0o755, b""), ("modules", stat.S_IFDIR | 0o755, b""),
               ("bin/busybox", stat.S_IFREG | 0o755, Path(bb).read_bytes()),
               ("init", stat.S_IFREG | 0o755, init_script(mods, out_dir).encode())]
    entries += [(f"modules/{m.name}", stat.S_IFREG | 0o644, m.read_bytes()) for m in mods]
    return newc(entries)


def command_script(argv: Sequence[str], env: Mapping[str, str], cwd: str) -> str:
    lines = ["cd " + shlex.quote(cwd)]
    lines += [f"export {k}={shlex.quote(v)}" for k, v in env.items()]
    lines.append("exec " + " ".join(shlex.quote(a) for a in argv))
    return "\n".join(lines) + "\n"


def run(argv: Sequence[str], *, env: Optional[Mapping[str, str]] = None, cwd: Optional[str] = None,
        timeout: float = 600.0, accel: Optional[str] = None, memory_mb: int = 768, cpus: Optional[int] = None,
        work_dir: Optional[str] = None) -> Result:
    """Run ``argv`` (the host's programs, at the host's paths) inside the machine as root, with
    ``env`` as its whole environment (default: PATH, HOME=/root, LANG=C.UTF-8) in ``cwd``
    (default: this one). ``accel``: "kvm" or "tcg"; default: the environment's ``RETUNER_TEST_VM_ACCEL``
    if set, else KVM when :func:`kvm_usable`, else TCG. ``cpus``:
    default 2 with KVM, 1 with TCG (two emulated processors on a busy 2-core host ran the same
    commands three times slower than one: 71 s against 25 s).
    The guest's own /tmp is the host's, under the tmpfs: what the command writes there is gone
    when the machine stops; ``work_dir`` (default: a temporary folder, removed afterwards) holds the
    initramfs, the console log and the shared folder where results come back (writable from inside,
    at the same path)."""
    accel = accel or os.environ.get(ACCEL_VARIABLE) or ("kvm" if kvm_usable() else "tcg")
    if accel not in ("kvm", "tcg"):
        raise VMError(f"{ACCEL_VARIABLE}={accel!r}: use kvm or tcg")
    program = qemu()
    image, version = kernel()
    cpus = cpus or (2 if accel == "kvm" else 1)
    if work_dir is None:
        with tempfile.TemporaryDirectory(prefix="alsavm-") as work:
            return _boot(program, image, version, argv, env, cwd, timeout, accel, memory_mb, cpus, work)
    return _boot(program, image, version, argv, env, cwd, timeout, accel, memory_mb, cpus, work_dir)


def _boot(program, image, version, argv, env, cwd, timeout, accel, memory_mb, cpus, work_dir) -> Result:
    work = os.path.abspath(work_dir)
    out = os.path.join(work, "result")
    os.makedirs(out, exist_ok=True)
    for name in ("stdout", "stderr", "returncode"):
        if os.path.exists(os.path.join(out, name)):
            os.unlink(os.path.join(out, name))
    initrd = os.path.join(work, "initramfs.cpio")
    with open(initrd, "wb") as fh:
        fh.write(initramfs(version, out))
    if env is None:
        env = {"PATH": "/usr/local/sbin:/usr/local/bin:/usr/sbin:/usr/bin:/sbin:/bin", "HOME": "/root",
               "LANG": "C.UTF-8"}
    with open(os.path.join(out, "command.sh"), "w") as fh:
        fh.write(command_script(argv, env, cwd or os.getcwd()))
    console = os.path.join(work, "console.log")
    cmd = [program, "-nodefaults", "-no-user-config", "-display", "none", "-no-reboot",
           "-M", "pc", "-m", str(memory_mb), "-smp", str(cpus),
           "-accel", accel, "-cpu", "host" if accel == "kvm" else "max",
           "-kernel", str(image), "-initrd", initrd,
           "-append", "console=ttyS0 quiet panic=-1 rdinit=/init",
           "-serial", f"file:{console}",
           "-virtfs", f"local,path=/,mount_tag={ROOT_TAG},security_model=none,readonly=on,multidevs=remap",
           "-virtfs", f"local,path={out},mount_tag={OUT_TAG},security_model=none"]
    start = time.monotonic()
    try:
        proc = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout)
    except subprocess.TimeoutExpired as exc:
        raise VMError(f"the machine did not finish within {timeout} s; console:\n" + _read(console)[-3000:]
                      + "\nthe command's standard error so far:\n" + _read(os.path.join(out, "stderr"))[-3000:]
                      ) from exc
    seconds = time.monotonic() - start
    log = _read(console)
    if proc.returncode != 0:
        raise VMError(f"qemu exited with {proc.returncode}: {proc.stderr.strip()[-2000:]}\nconsole:\n"
                      + log[-3000:])
    rc_text = _read(os.path.join(out, "returncode")).strip()
    if not rc_text:
        raise VMError("the command did not finish inside the machine; console:\n" + log[-3000:])
    return Result(int(rc_text), _read(os.path.join(out, "stdout")), _read(os.path.join(out, "stderr")),
                  log, seconds, accel)


def _read(path: str) -> str:
    try:
        with open(path, errors="replace") as fh:
            return fh.read()
    except FileNotFoundError:
        return ""


def probe_report(script: str, repo: str) -> dict:
    """Run a probe script of tests/ (``python tests/SCRIPT`` from the checkout ``repo``) in the
    machine and return the JSON object it prints, with ``machine`` (seconds, accelerator) added.
    Fails the calling test (never skips) when the machine cannot run or the probe fails."""
    import json  # noqa: PLC0415
    import sys  # noqa: PLC0415

    import pytest  # noqa: PLC0415

    try:
        result = run([sys.executable, os.path.join(repo, "tests", script)], cwd=repo, timeout=900)
    except VMError as exc:
        pytest.fail(f"the virtual machine with an ALSA sequencer could not run: {exc}", pytrace=False)
    if result.returncode != 0:
        pytest.fail(f"the probe exited with {result.returncode} inside the machine:\n{result.stderr[-4000:]}",
                    pytrace=False)
    report = json.loads(result.stdout)
    report["machine"] = {"seconds": result.seconds, "accel": result.accel}
    print(f"\nvirtual machine ({result.accel}): {result.seconds:.1f} s")
    return report


def part(report: dict, name: str, why_missing: str = "") -> dict:
    """One step's record from a probe's report; the step's own error, or its absence, fails the test."""
    errors = report.get("errors", {})
    assert name not in errors, f"the probe's step {name!r} failed inside the machine:\n{errors[name]}"
    assert name in report, f"the probe's step {name!r} did not run{why_missing}"
    return report[name]
