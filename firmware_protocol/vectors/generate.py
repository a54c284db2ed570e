"""Write protocol_v2.json, the test vectors shared by the Python codec and the C core.

    python firmware_protocol/vectors/generate.py   # rewrites protocol_v2.json beside it

Built only from the standard library (``struct``, ``binascii.crc_hqx``) and the
general-purpose ``cobs`` package (test extra), never from this project's codecs, so
the vectors are an outside reference for both.  ``tests/test_protocol_vectors.py``
checks that the file on disk is what this script produces.

Public names: ``build_vectors() -> dict``, ``main() -> None``.
"""

from __future__ import annotations

import binascii
import json
import struct
from pathlib import Path

from cobs import cobs

OUT = Path(__file__).resolve().parent / "protocol_v2.json"

# Message type codes and layouts as written in PROTOCOL.md §3-§4.
TYPES = {
    "GetHello": 0x01,
    "Configure": 0x02,
    "Start": 0x03,
    "Stop": 0x04,
    "Command": 0x05,
    "KeepAlive": 0x06,
    "GetStatus": 0x07,
    "Hello": 0x81,
    "Sample": 0x82,
    "Status": 0x83,
}


def crc(data: bytes) -> int:
    """CRC-16/CCITT-FALSE: binascii.crc_hqx with initial value 0xFFFF."""
    return binascii.crc_hqx(data, 0xFFFF)


def payload_of(msg_type: int, seq: int, body: bytes) -> bytes:
    head = struct.pack("<BH", msg_type, seq) + body
    return head + struct.pack("<H", crc(head))


def wire_of(payload: bytes) -> bytes:
    return cobs.encode(payload) + b"\x00"


def body_of(name: str, f: dict) -> bytes:
    if name == "Hello":
        return struct.pack(
            "<B16sBBBBiiiiIIIBIBB",
            f["version"],
            f["identity"].encode("ascii"),
            f["adc_bits"],
            f["dac_bits"],
            f["n_inputs"],
            f["n_outputs"],
            f["adc_min_uV"],
            f["adc_max_uV"],
            f["dac_min_uV"],
            f["dac_max_uV"],
            f["max_rate_hz"],
            f["watchdog_min_us"],
            f["watchdog_max_us"],
            f["capabilities"],
            f["law_queue"],
            f["mg_groups"],
            f["max_samples"],
        )
    if name == "Sample":
        k = len(f["adc_counts"])
        return struct.pack(
            f"<IIHB{k}H", f["counter"], f["clock_us"], f["cmd_seq"], f["status"], *f["adc_counts"]
        )
    if name == "Status":
        return struct.pack(
            "<BBHBIIIIIIIIIBI",
            *(
                f[k]
                for k in (
                    "state",
                    "status",
                    "ack_seq",
                    "result",
                    "counter",
                    "bad_frames",
                    "unknown_messages",
                    "rejected",
                    "late_commands",
                    "missing_commands",
                    "watchdog_trips",
                    "commands_applied",
                    "rate_hz",
                    "n_inputs",
                    "watchdog_us",
                )
            ),
        )
    if name == "Configure":
        k = len(f["fault_counts"])
        return struct.pack(
            f"<BIBI{k}H",
            f["version"],
            f["rate_hz"],
            f["n_inputs"],
            f["watchdog_us"],
            *f["fault_counts"],
        )
    if name == "Command":
        k = len(f["dac_counts"])
        return struct.pack(f"<I{k}H", f["answers_counter"], *f["dac_counts"])
    return b""


HELLO = {
    "identity": "pty-board",
    "adc_bits": 16,
    "dac_bits": 16,
    "n_inputs": 1,
    "n_outputs": 1,
    "adc_min_uV": -10_000_000,
    "adc_max_uV": 10_000_000,
    "dac_min_uV": -10_000_000,
    "dac_max_uV": 10_000_000,
    "max_rate_hz": 50_000,
    "watchdog_min_us": 100,
    "watchdog_max_us": 60_000_000,
    "version": 2,
    "capabilities": 1,
    "law_queue": 1024,
    "mg_groups": 1,
    "max_samples": 1,
}

STATUS = {
    "state": 2,
    "status": 3,
    "ack_seq": 0,
    "result": 0x80,
    "counter": 123_456,
    "bad_frames": 1,
    "unknown_messages": 2,
    "rejected": 3,
    "late_commands": 4,
    "missing_commands": 5,
    "watchdog_trips": 1,
    "commands_applied": 123_000,
    "rate_hz": 20_000,
    "n_inputs": 1,
    "watchdog_us": 50_000,
}

# (name, message class, seq, fields)
MESSAGES = [
    ("command_worked_example", "Command", 1, {"answers_counter": 1000, "dac_counts": [2048]}),
    (
        "command_two_outputs",
        "Command",
        0xFFFF,
        {"answers_counter": 2**32 - 1, "dac_counts": [0, 65535]},
    ),
    (
        "command_sixteen_outputs",
        "Command",
        0x0100,
        {"answers_counter": 0, "dac_counts": list(range(0, 16 * 4096, 4096))},
    ),
    (
        "sample_one_input",
        "Sample",
        7,
        {"counter": 999, "clock_us": 49_950, "cmd_seq": 1, "status": 0, "adc_counts": [26214]},
    ),
    (
        "sample_fault",
        "Sample",
        0,
        {"counter": 0, "clock_us": 0, "cmd_seq": 0, "status": 0x0B, "adc_counts": [0, 0, 0]},
    ),
    (
        "sample_sixteen_inputs",
        "Sample",
        0xABCD,
        {
            "counter": 2**32 - 1,
            "clock_us": 2**32 - 1,
            "cmd_seq": 0xFFFF,
            "status": 0x04,
            "adc_counts": [0xFF00 + i for i in range(16)],
        },
    ),
    ("hello", "Hello", 0, HELLO),
    (
        "hello_12bit_unipolar",
        "Hello",
        1,
        {
            **HELLO,
            "identity": "sixteen-chars-id",
            "adc_bits": 12,
            "dac_bits": 12,
            "n_inputs": 2,
            "n_outputs": 2,
            "adc_min_uV": 0,
            "adc_max_uV": 3_300_000,
            "dac_min_uV": 550_000,
            "dac_max_uV": 2_750_000,
            "max_rate_hz": 10_000,
            "capabilities": 0,
            "law_queue": 0,
            "mg_groups": 0,
            "max_samples": 0,
        },
    ),
    ("status_report", "Status", 513, STATUS),
    (
        "status_idle",
        "Status",
        2,
        {
            **STATUS,
            "state": 0,
            "status": 0,
            "ack_seq": 9,
            "result": 0,
            "counter": 0,
            "bad_frames": 0,
            "unknown_messages": 0,
            "rejected": 0,
            "late_commands": 0,
            "missing_commands": 0,
            "watchdog_trips": 0,
            "commands_applied": 0,
            "rate_hz": 0,
            "n_inputs": 0,
            "watchdog_us": 0,
        },
    ),
    (
        "configure",
        "Configure",
        2,
        {
            "rate_hz": 20_000,
            "n_inputs": 1,
            "watchdog_us": 50_000,
            "fault_counts": [32768],
            "version": 2,
        },
    ),
    (
        "configure_two_outputs",
        "Configure",
        3,
        {
            "rate_hz": 1,
            "n_inputs": 2,
            "watchdog_us": 4_000_000_000,
            "fault_counts": [2048, 0],
            "version": 2,
        },
    ),
    ("get_hello", "GetHello", 0, {}),
    ("start", "Start", 3, {}),
    ("stop", "Stop", 4, {}),
    ("keepalive", "KeepAlive", 5, {}),
    ("get_status", "GetStatus", 6, {}),
]


def _messages() -> list[dict]:
    out = []
    for name, cls, seq, fields in MESSAGES:
        p = payload_of(TYPES[cls], seq, body_of(cls, fields))
        out.append(
            {
                "name": name,
                "message": cls,
                "type": TYPES[cls],
                "seq": seq,
                "fields": fields,
                "payload": p.hex(),
                "wire": wire_of(p).hex(),
            }
        )
    return out


def _reference(stream: bytes) -> dict:
    """Expected deframer output: cobs.decode + length + crc_hqx on each 0x00-delimited piece."""
    good, reasons = [], {"cobs": 0, "short": 0, "long": 0, "crc": 0}
    for piece in stream.split(b"\x00")[:-1]:
        if not piece:
            continue
        try:
            p = cobs.decode(piece)
        except cobs.DecodeError:
            reasons["cobs"] += 1
            continue
        if len(p) > 254:
            reasons["long"] += 1
        elif len(p) < 5:
            reasons["short"] += 1
        elif crc(p[:-2]) != struct.unpack("<H", p[-2:])[0]:
            reasons["crc"] += 1
        else:
            good.append(p.hex())
    return {"payloads": good, "bad": sum(reasons.values()), "bad_by_reason": reasons}


def _streams() -> list[dict]:
    cmd = payload_of(0x05, 1, struct.pack("<IH", 1000, 2048))
    smp = payload_of(0x82, 7, struct.pack("<IIHBH", 999, 49_950, 1, 0, 26214))
    flipped = bytearray(cmd)
    flipped[4] ^= 0x10  # one bit of answers_counter
    long_body = bytes((i % 255) + 1 for i in range(250))
    max_payload = payload_of(0x7F, 0x0202, long_body[:249])  # 254 bytes, unknown type
    over_long = payload_of(0x7F, 0x0202, long_body)  # 255 bytes
    cases = [
        ("two_frames", wire_of(cmd) + wire_of(smp)),
        ("leading_delimiters", b"\x00\x00" + wire_of(cmd)),
        ("resync_after_garbage", b"\x13\x37\x42\x99\x01\x02\x03" + b"\x00" + wire_of(smp)),
        ("bad_crc_then_good", wire_of(bytes(flipped)) + wire_of(cmd)),
        ("cobs_block_past_end", bytes([0x09, 0x05, 0x01]) + b"\x00" + wire_of(cmd)),
        ("empty_payload", b"\x01\x00" + wire_of(cmd)),
        ("short_payload", wire_of(cmd[:4]) + wire_of(smp)),
        ("max_payload_254", wire_of(max_payload)),
        ("over_long_payload_255", wire_of(over_long) + wire_of(cmd)),
        (
            "concatenated_without_delimiter",
            cobs.encode(cmd) + cobs.encode(smp) + b"\x00" + wire_of(cmd),
        ),
        ("unfinished_tail", wire_of(cmd) + cobs.encode(smp)),
        ("zero_inside_frame", wire_of(cmd)[:5] + b"\x00" + wire_of(cmd)[5:] + wire_of(smp)),
    ]
    out = []
    for name, data in cases:
        out.append({"name": name, "wire": data.hex(), **_reference(data)})
    return out


def _board_ignores() -> list[dict]:
    """Good frames (CRC fine) that a board must count as unknown and not act on."""
    cases = [
        ("configure_version_1", 0x02, struct.pack("<BIBIH", 1, 1000, 1, 50_000, 32768)),
        (
            "configure_wrong_output_count",
            0x02,
            struct.pack("<BIBIHH", 1, 1000, 1, 50_000, 32768, 32768),
        ),
        ("command_odd_length", 0x05, struct.pack("<IHB", 3, 2048, 1)),
        ("command_wrong_output_count", 0x05, struct.pack("<IHH", 3, 2048, 2048)),
        ("unknown_type_0x7f", 0x7F, b""),
        ("hello_sent_to_board", 0x81, body_of("Hello", HELLO)),
        ("start_with_body", 0x03, b"\x01"),
    ]
    return [
        {
            "name": n,
            "payload": payload_of(t, 9, b).hex(),
            "wire": wire_of(payload_of(t, 9, b)).hex(),
        }
        for n, t, b in cases
    ]


def build_vectors() -> dict:
    cobs_cases = [
        # Encoding examples as listed in the Wikipedia article "Consistent Overhead Byte
        # Stuffing" (from memory), in the scheme of Cheshire & Baker 1999; each is also
        # checked against the `cobs` package by tests/test_protocol_vectors.py.
        "00",
        "0000",
        "001100",
        "11220033",
        "11223344",
        "11000000",
        bytes(range(1, 255)).hex(),
        bytes(range(0, 255)).hex(),
        bytes(range(1, 256)).hex(),
        (bytes(range(2, 256)) + b"\x00").hex(),
        (bytes(range(3, 256)) + b"\x00\x01").hex(),
        # and block-edge cases
        "",
        ("01" * 253),
        ("01" * 254) + "00",
        ("01" * 508),
        ("01" * 509),
    ]
    return {
        "protocol_version": 2,
        "generated_by": "firmware_protocol/vectors/generate.py (struct, binascii.crc_hqx, cobs)",
        "crc16_ccitt_false": [
            # Check value of CRC-16/IBM-3740 (alias CRC-16/CCITT-FALSE) in the CRC RevEng
            # catalogue: 0x29B1 for the ASCII string "123456789".
            {"data": b"123456789".hex(), "crc": 0x29B1, "source": "CRC catalogue check value"},
            {"data": "", "crc": crc(b""), "source": "binascii.crc_hqx(b'', 0xFFFF)"},
            {"data": "00", "crc": crc(b"\x00"), "source": "binascii.crc_hqx"},
            {"data": "ff" * 32, "crc": crc(b"\xff" * 32), "source": "binascii.crc_hqx"},
            {
                "data": bytes(range(256)).hex(),
                "crc": crc(bytes(range(256))),
                "source": "binascii.crc_hqx",
            },
        ],
        "cobs": [
            {"decoded": d, "encoded": cobs.encode(bytes.fromhex(d)).hex()} for d in cobs_cases
        ],
        "messages": _messages(),
        "streams": _streams(),
        "board_ignores": _board_ignores(),
    }


def main() -> None:
    OUT.write_text(json.dumps(build_vectors(), indent=1) + "\n")
    print(f"wrote {OUT}")


if __name__ == "__main__":
    main()
