"""Receiving scans over the network: ``flairwatch receive``'s Store SCP writes into the inbox.

Outside references: pynetdicom's SCU (the reference implementation of PS3.7 and PS3.8) sends
MR slices built from pydicom's ``MR_small.dcm``; association rejections are checked field by
field against the A-ASSOCIATE-RJ PDU of PS3.8 9.3.4 (Table 9-21: result, source,
reason/diagnostic); C-STORE statuses against PS3.4 Annex B.2.3 (Table B.2-1); C-ECHO against
PS3.7 9.1.5. The inbox is read back with the watcher's own walk (what the daemon would take)
and with pydicom.
"""

from __future__ import annotations

import logging
import signal
import subprocess
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from pydicom import dcmread
from pynetdicom import AE, evt
from pynetdicom.pdu import A_ASSOCIATE_RJ

from flairwatch.cli import main
from flairwatch.config import ReceiveSettings
from flairwatch.intake.discover import iter_candidate_files
from flairwatch.network.receive import RECEIVING, Receiver, inbox_name
from tests.network_fixtures import free_port, iter_files, mr_slices, wait_for

RJ: dict[Any, A_ASSOCIATE_RJ] = {}  # the A-ASSOCIATE-RJ PDU each rejected association got
MR_IMAGE_STORAGE = "1.2.840.10008.5.1.4.1.1.4"  # PS3.4 Annex B.5


def _receiver(inbox: Path, **kw: Any) -> Receiver:
    settings = ReceiveSettings("FLAIRWATCH", free_port(), ("SCANNER",), **kw)
    receiver = Receiver(settings, inbox)
    receiver.start()
    return receiver


def _associate(port: int, calling: str = "SCANNER", called: str = "FLAIRWATCH") -> Any:
    """A pynetdicom SCU association; ``RJ[assoc]`` is the A-ASSOCIATE-RJ PDU if rejected."""
    ae = AE(ae_title=calling)
    ae.add_requested_context(MR_IMAGE_STORAGE)
    ae.add_requested_context("1.2.840.10008.1.1")  # Verification
    rj: list[A_ASSOCIATE_RJ] = []

    def on_pdu(event: Any) -> None:
        if isinstance(event.pdu, A_ASSOCIATE_RJ):
            rj.append(event.pdu)

    assoc = ae.associate(
        "127.0.0.1", port, ae_title=called, evt_handlers=[(evt.EVT_PDU_RECV, on_pdu)]
    )
    if rj:
        RJ[assoc] = rj[0]
    return assoc


def _listening(port: int) -> bool:
    assoc = _associate(port)
    up = bool(assoc.is_established)
    if up:
        assoc.release()
    return up


def _inbox_files(inbox: Path) -> list[Path]:
    """What the watcher would take from the inbox (its own walk skips temporary names)."""
    return sorted(iter_candidate_files([inbox]))


def test_instance_paths_are_hashed_keys_never_header_text() -> None:
    rel = inbox_name("1.2.3", "1.2.3.4", "../../etc/passwd")
    assert len(rel.parts) == 3 and ".." not in str(rel) and "passwd" not in str(rel)
    assert rel == inbox_name("1.2.3", "1.2.3.4", "../../etc/passwd")  # the same UIDs, same place
    assert rel.parent == inbox_name("1.2.3", "1.2.3.4", "1.2.3.4.5").parent  # one series folder


def test_a_series_sent_by_an_scu_lands_complete_in_the_inbox(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    caplog.set_level(logging.INFO, logger="flairwatch.network.receive")
    inbox, slices = tmp_path / "inbox", mr_slices(5, seed=3)
    receiver = _receiver(inbox)
    try:
        assoc = _associate(receiver.port)
        assert assoc.is_established
        assert assoc.send_c_echo().Status == 0x0000  # PS3.7 9.1.5: C-ECHO success
        statuses = [assoc.send_c_store(ds).Status for ds in slices]
        assoc.release()
        files = _inbox_files(inbox)
        mtimes = [f.stat().st_mtime_ns for f in files]
        again = _associate(receiver.port)  # the same series once more (a scanner's re-send)
        assert [again.send_c_store(ds).Status for ds in slices] == [0x0000] * 5
        again.release()
        assert wait_for(lambda: caplog.text.count("association from") == 2, 5)
    finally:
        receiver.stop()
    assert statuses == [0x0000] * 5  # PS3.4 Table B.2-1: Success
    assert len(files) == 5 and len({f.parent for f in files}) == 1  # one study/series folder
    assert [f.stat().st_mtime_ns for f in files] == mtimes  # an identical re-send changes nothing
    got = {str(d.SOPInstanceUID): d for d in (dcmread(f) for f in files)}
    assert set(got) == {str(ds.SOPInstanceUID) for ds in slices}
    for ds in slices:
        back = got[str(ds.SOPInstanceUID)]
        assert back.PixelData == ds.PixelData
        assert np.array_equal(back.pixel_array, ds.pixel_array)
        assert back.SeriesInstanceUID == ds.SeriesInstanceUID
    assert list(iter_files(inbox / RECEIVING)) == []
    lines = [r.getMessage() for r in caplog.records if "association from" in r.getMessage()]
    assert len(lines) == 2 and "5 instance(s) stored" in lines[0]  # once per association


@pytest.mark.parametrize(
    ("calling", "called", "reason"),
    [
        ("STRANGER", "FLAIRWATCH", 3),  # PS3.8 Table 9-21: calling-AE-title-not-recognized
        ("SCANNER", "SOMEONE", 7),  # called-AE-title-not-recognized
    ],
)
def test_unknown_ae_titles_are_rejected_at_association(
    tmp_path: Path, calling: str, called: str, reason: int
) -> None:
    receiver = _receiver(tmp_path / "inbox")
    try:
        assoc = _associate(receiver.port, calling, called)
    finally:
        receiver.stop()
    assert assoc.is_rejected and not assoc.is_established
    # result 1 rejected-permanent, source 1 DICOM UL service-user
    rj = RJ.pop(assoc)
    assert (rj.result, rj.source, rj.reason_diagnostic) == (1, 1, reason)
    assert _inbox_files(tmp_path / "inbox") == []


def test_associations_beyond_the_limit_are_rejected_transiently(tmp_path: Path) -> None:
    receiver = _receiver(tmp_path / "inbox", max_associations=1)
    try:
        first = _associate(receiver.port)
        second = _associate(receiver.port)
        assert first.is_established
        first.release()
    finally:
        receiver.stop()
    # PS3.8 Table 9-21: result 2 rejected-transient, source 3 service-provider (presentation),
    # reason 2 local-limit-exceeded
    assert second.is_rejected
    rj = RJ.pop(second)
    assert (rj.result, rj.source, rj.reason_diagnostic) == (2, 3, 2)


def test_an_instance_over_the_size_limit_is_refused(tmp_path: Path) -> None:
    inbox = tmp_path / "inbox"
    big = mr_slices(1, rows=1024, cols=768, seed=1)[0]  # 1.5 MiB of pixel data
    small = mr_slices(1, seed=2)[0]
    receiver = _receiver(inbox, max_instance_mb=1)
    try:
        assoc = _associate(receiver.port)
        refused = assoc.send_c_store(big).Status
        stored = assoc.send_c_store(small).Status
        assoc.release()
    finally:
        receiver.stop()
    assert refused == 0xA700  # PS3.4 Table B.2-1: Refused: Out of Resources
    assert stored == 0x0000  # the association goes on
    assert [dcmread(f).SOPInstanceUID for f in _inbox_files(inbox)] == [small.SOPInstanceUID]


_STALLING_SCU = """
import sys, time
from pydicom import dcmread
from pynetdicom import AE, evt
from pynetdicom.pdu import P_DATA_TF

ds = dcmread(sys.argv[1])
sent = [0]

def on_sent(event):  # stall the upper layer in the middle of the data set
    if isinstance(event.pdu, P_DATA_TF):
        sent[0] += 1
        if sent[0] == 40:
            print("stalled", flush=True)
            time.sleep(60)

ae = AE(ae_title="SCANNER")
ae.add_requested_context(ds.SOPClassUID, ds.file_meta.TransferSyntaxUID)
assoc = ae.associate("127.0.0.1", int(sys.argv[2]), ae_title="FLAIRWATCH",
                     evt_handlers=[(evt.EVT_PDU_SENT, on_sent)])
assoc.send_c_store(ds)
"""


def test_a_connection_dropped_mid_transfer_leaves_no_half_file(tmp_path: Path) -> None:
    inbox, script, data = tmp_path / "inbox", tmp_path / "scu.py", tmp_path / "big.dcm"
    script.write_text(_STALLING_SCU, encoding="utf-8")
    mr_slices(1, rows=1024, cols=1024, seed=4)[0].save_as(data, enforce_file_format=True)  # 2 MiB
    receiver = _receiver(inbox)
    try:
        scu = subprocess.Popen(
            [sys.executable, str(script), str(data), str(receiver.port)],
            stdout=subprocess.PIPE,
            text=True,
        )
        try:
            assert scu.stdout is not None and scu.stdout.readline().strip() == "stalled"

            def partial() -> list[int]:  # sizes of the files the receiver is writing
                return [f.stat().st_size for f in iter_files(inbox / RECEIVING)]

            assert wait_for(lambda: len(partial()) == 1 and partial()[0] > 100_000, 5), partial()
            assert partial()[0] < data.stat().st_size
            assert _inbox_files(inbox) == []  # the half file is under a name the watcher skips
        finally:
            scu.kill()  # the connection drops mid-transfer (SIGKILL: no A-ABORT, no release)
            scu.communicate()
        assert wait_for(lambda: not list(iter_files(inbox / RECEIVING)), 5)  # cleaned up
    finally:
        receiver.stop()
    assert _inbox_files(inbox) == [] and list(iter_files(inbox)) == []


def test_receive_command_runs_until_sigterm(tmp_path: Path) -> None:
    inbox, cfg, port = tmp_path / "inbox", tmp_path / "net.yaml", free_port()
    cfg.write_text(
        f"inbox: {inbox}\nreceive: {{ae_title: FLAIRWATCH, port: {port}, allow: [SCANNER]}}\n",
        encoding="utf-8",
    )
    proc = subprocess.Popen(
        [sys.executable, "-m", "flairwatch", "receive", "--config", str(cfg)],
        stderr=subprocess.PIPE,
        text=True,
    )
    try:
        assert wait_for(lambda: _listening(port), 10)
        assoc = _associate(port)
        ds = mr_slices(1, seed=5)[0]
        assert assoc.send_c_store(ds).Status == 0x0000
        assoc.release()
    finally:
        proc.send_signal(signal.SIGTERM)
        _out, err = proc.communicate(timeout=10)
    assert proc.returncode == 0, err
    assert "receiving as FLAIRWATCH" in err and "1 instance(s) stored" in err
    assert [dcmread(f).SOPInstanceUID for f in _inbox_files(inbox)] == [ds.SOPInstanceUID]


def test_receive_without_an_inbox_is_a_one_line_config_error(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    cfg = tmp_path / "net.yaml"
    cfg.write_text(
        "receive: {ae_title: FLAIRWATCH, port: 104, allow: [SCANNER]}\n", encoding="utf-8"
    )
    assert main(["receive", "--config", str(cfg)]) == 2
    err = capsys.readouterr().err.strip()
    assert "\n" not in err and "'inbox'" in err


@pytest.mark.parametrize(
    ("text", "key"),
    [
        # PS3.5 6.2, VR AE: at most 16 characters, no backslash
        ("receive: {ae_title: ABCDEFGHIJKLMNOPQ, port: 11112, allow: [A]}", "receive.ae_title"),
        ("receive: {ae_title: FW, port: 11112, allow: ['A\\\\B']}", "receive.allow[0]"),
        ("receive: {ae_title: FW, port: 0, allow: [A]}", "receive.port"),
        ("receive: {ae_title: FW, port: 11112, allow: []}", "receive.allow"),
        ("receive: {ae_title: FW, port: 11112, allow: [A], max_associations: 0}", "receive.max"),
        ("send: {nodes: [{name: a, ae_title: A, host: h}]}", "send.nodes[0]"),
        ("send: {nodes: [{name: a, ae_title: A, host: h, port: 1, objects: [mask]}]}", "objects"),
        ("send: {nodes: [{name: a/b, ae_title: A, host: h, port: 1}]}", "send.nodes[0].name"),
        ("send: {give_up_days: -1, nodes: [{name: a, ae_title: A, host: h, port: 1}]}", "give_up"),
    ],
)
def test_bad_network_settings_name_their_key(tmp_path: Path, text: str, key: str) -> None:
    from flairwatch.config import load_config
    from flairwatch.errors import ConfigInvalid

    path = tmp_path / "c.yaml"
    path.write_text(text + "\n", encoding="utf-8")
    with pytest.raises(ConfigInvalid, match=key.replace(".", r"\.").replace("[", r"\[")) as err:
        load_config(path)
    assert "\n" not in str(err.value)


def _unit(name: str) -> dict[str, list[str]]:
    """Key -> values of a systemd unit file (systemd.syntax(7): later lines add to a list)."""
    keys: dict[str, list[str]] = {}
    path = Path(__file__).parent.parent / "deploy" / name
    for line in path.read_text(encoding="utf-8").splitlines():
        if "=" in line and not line.startswith(("#", ";", "[")):
            k, _, v = line.partition("=")
            keys.setdefault(k.strip(), []).append(v.strip())
    return keys


def test_only_the_network_unit_has_network_and_only_for_its_peers() -> None:
    daemon, network = _unit("flairwatch.service"), _unit("flairwatch-network.service")
    # systemd.exec(5): PrivateNetwork=yes leaves only a loopback device; AF_UNIX only
    assert daemon["PrivateNetwork"] == ["yes"] and daemon["RestrictAddressFamilies"] == ["AF_UNIX"]
    assert daemon["IPAddressDeny"] == ["any"]
    # systemd.resource-control(5): deny any, allow the listed peers; bind only the listen port
    assert network["IPAddressDeny"] == ["any"] and "PrivateNetwork" not in network
    assert network["IPAddressAllow"][0] == "localhost" and len(network["IPAddressAllow"]) == 2
    assert network["SocketBindDeny"] == ["any"] and network["SocketBindAllow"] == ["tcp:11112"]
    assert network["ExecStart"][0].split()[1:3] == ["receive", "--config"]
    assert (
        network["User"] == daemon["User"] and network["StateDirectory"] == daemon["StateDirectory"]
    )
