"""Is the instrument behind a role of that kind, and does each role have an instrument of its own?

Checked when a bench is opened, before any run row is written or RF goes on. The role check is
one harmless operation that only that kind of instrument answers, sent after *IDN? with the
error queue read: a source answers its RF-state query, an analyzer its sweep-time query, a power
meter takes its configure command (which its own preparation sends anyway). An instrument of
another kind answers with an SCPI error (-113, undefined header) or not at all; either refuses
the bench in one line naming the role and the instrument's *IDN?.

It runs on the raw connection, outside supervision: an instrument of the wrong kind is bad input,
not a fault worth minutes of retries. The probe and the error query are written together and the
replies read in order, so an instrument that stays silent for a query it does not know costs no
timeout (common practice for SCPI instruments: an undefined query queues -113 and sends nothing).
"""

from __future__ import annotations

import pyvisa
from pyvisa import rname

from tonebench.errors import InputError
from tonebench.instruments.scpi import ScpiInstrument, identity, parse_reply

# The operation each kind answers and the others do not (all are required by their dialects).
ROLE_PROBES = {"source": "read_rf", "analyzer": "read_sweep_time", "power_meter": "configure",
               "chamber": "measure_temperature"}
KIND_NAMES = {"source": "a signal source", "analyzer": "a spectrum analyzer", "power_meter": "a power meter",
              "chamber": "a thermal chamber"}


def normalised_resource(resource: str) -> str:
    """A resource string in one spelling (board number filled in, case folded), for comparing."""
    try:
        return str(rname.parse_resource_name(resource)).lower()
    except ValueError:
        return resource.strip().lower()


def check_distinct_resources(resources: dict[str, str], roles: list[str], shared: tuple[str, str] | None = None) -> None:
    """Two roles on one resource string: refused before anything is opened, except the pair
    `shared` (gate and drain on two outputs of one supply, see shared_supply)."""
    seen: dict[str, str] = {}
    for role in roles:
        key = normalised_resource(resources[role])
        if key in seen and (seen[key], role) != shared:
            raise InputError(
                f"instruments.{seen[key]} and instruments.{role} both use {resources[role]}; "
                "each role needs an instrument of its own (gate and drain may share a supply on two channels)"
            )
        seen.setdefault(key, role)


def shared_supply(settings, resources: dict[str, str], dialects: dict) -> bool:
    """Whether gate and drain are two outputs of one multi-output supply (one resource, one
    dialect, two channels): then they share one connection. The same output for both is refused.
    `settings` is the bench file, `dialects` role -> Dialect."""
    if "gate" not in resources or "drain" not in resources:
        return False
    channels = {role: settings.instruments[role].channel for role in ("gate", "drain")}
    names = {role: dialects[role].name for role in ("gate", "drain")}
    if normalised_resource(resources["gate"]) != normalised_resource(resources["drain"]):
        return False
    if names["gate"] != names["drain"]:
        raise InputError(f"instruments.gate and instruments.drain both use {resources['gate']} with different dialects "
                         f"({names['gate']}, {names['drain']}); one supply has one dialect")
    if channels["gate"] == channels["drain"]:
        raise InputError(f"instruments.gate and instruments.drain are both channel {channels['gate']} of "
                         f"{resources['gate']}; give each its own output (channel = 1, 2, ...)")
    return True


def check_distinct_identities(opened: list[ScpiInstrument]) -> None:
    """Two roles answered by one instrument (same maker, model and serial from *IDN?), e.g. one
    analyzer reached through two addresses. An empty or "0" serial cannot tell units apart and
    is not compared."""
    seen: dict[tuple[str, ...], ScpiInstrument] = {}
    for inst in opened:
        key = identity(inst.idn)
        if len(key) < 3 or key[2] in ("", "0"):
            continue
        if key in seen:
            first = seen[key]
            raise InputError(
                f"instruments.{first.label} and instruments.{inst.label} are the same instrument ({inst.idn!r} at "
                f"{first.resource_name} and {inst.resource_name}); each role needs an instrument of its own"
            )
        seen[key] = inst


def check_role(inst: ScpiInstrument, role_kind: str) -> None:
    """Refuse (InputError, one line) an instrument that does not answer its role's probe."""
    operation = ROLE_PROBES.get(role_kind)
    if operation is None:
        return
    problem = _probe(inst, operation)
    if problem is not None:
        op = inst.dialect.operations[operation]
        raise InputError(
            f"instruments.{inst.label}: the instrument at {inst.resource_name} ({inst.idn!r}) is not "
            f"{KIND_NAMES[role_kind]}: {operation} ({op.template!r}) {problem}; check the bench file's resource for "
            f"{inst.label}"
        )


def _probe(inst: ScpiInstrument, operation: str) -> str | None:
    """Send the probe after *CLS, then the error query; what went wrong, or None."""
    ops = inst.dialect.operations
    probe, error_query = ops[operation], ops["next_error"]
    handle = inst.resource
    with inst.io_lock:
        try:
            handle.write(ops["clear_status"].template)
            handle.write(probe.template)
            handle.write(error_query.template)
            first = handle.read().strip()
            if probe.is_query:
                entry = _error_entry(first)
                if entry is not None and entry.code != 0:
                    return f"got no reply but error {entry.code}, {entry.message}"
                try:
                    parse_reply(probe.reply, first)
                except ValueError:
                    return f"replied {first!r}"
                first = handle.read().strip()
            entry = _error_entry(first)
        except pyvisa.errors.VisaIOError as exc:
            if exc.error_code == pyvisa.constants.StatusCode.error_timeout:
                return f"got no reply within {handle.timeout / 1000:g} s"
            return f"failed: {exc}"
        except OSError as exc:
            return f"failed: {exc}"
    if entry is None:
        return f"left the error query answering {first!r}"
    if entry.code != 0:
        return f"raised error {entry.code}, {entry.message}"
    return None


def _error_entry(text: str):
    try:
        return parse_reply("error", text)
    except ValueError:
        return None
