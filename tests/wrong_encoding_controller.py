"""A controller for tests/test_encoding_mismatch.py that mixes in the wrong encoding.

It runs as its own process. Every sensor frame (or MQTT message) from the rig gets a
good command of GOOD volts in the link's encoding; every PERIOD-th one is followed by a
command of WRONG volts in the other encoding (int16 counts on a float32 link, float32
on an int16 link), with a new sequence number and the same tick echo, so only the
encoding check stands between it and the plant. Before that check, WRONG volts reached
the plant input.

    wrong_encoding_controller.py pty  FD LINK_ENCODING SCALE
    wrong_encoding_controller.py mqtt HOST PORT SENSORS_TOPIC COMMANDS_TOPIC LINK_ENCODING SCALE

It prints "wrong-encoding: ready" once listening and "wrong-encoding: sent N" at the end
(N wrong-encoding commands).
"""

from __future__ import annotations

import asyncio
import os
import select
import sys

from plantrig.io import (
    Encoding,
    FrameSplitter,
    Kind,
    cobs_decode,
    cobs_encode,
    decode_frame,
    encode_frame,
)

GOOD = 0.5      # volts, within the conveyor's -24..24 V input
WRONG = 7.0     # volts as the wrong frame would have been read: raw 7 on a float32 link
PERIOD = 5


class Answers:
    """The commands that answer one sensor frame; counts the wrong ones sent."""

    def __init__(self, link: Encoding, scale: float) -> None:
        self.link, self.scale = link, scale
        self.other = Encoding.F32 if link == Encoding.I16 else Encoding.I16
        self.seq = self.n = self.wrong = 0

    def to(self, wire: bytes) -> list[bytes]:
        """Frames (COBS, delimited) answering ``wire`` if it is a sensor frame."""
        frame = decode_frame(wire, scale=self.scale, link_encoding=self.link)
        if frame.kind != Kind.SENSOR:
            return []
        out = [self._command(frame.tick, GOOD, self.link, self.scale)]
        self.n += 1
        if self.n % PERIOD == 0:
            # raw 7 at scale 1 (int16), or 7.0 (float32): WRONG volts if taken as it is
            out.append(self._command(frame.tick, WRONG, self.other, 1.0))
            self.wrong += 1
        return out

    def _command(self, tick: int, value: float, encoding: Encoding, scale: float) -> bytes:
        wire = encode_frame(Kind.COMMAND, self.seq, tick, [value], encoding=encoding,
                            scale=scale)
        self.seq += 1
        return wire


def serve_pty(fd: int, answers: Answers) -> None:
    os.set_blocking(fd, False)
    splitter = FrameSplitter()
    print("wrong-encoding: ready", flush=True)
    heard = False
    while True:
        # a loaded machine may take seconds to start the rig: wait long for the first
        # frame, then end after 2 s of silence (the rig has stopped)
        ready, _, _ = select.select([fd], [], [], 2.0 if heard else 30.0)
        if not ready:
            return
        heard = True
        try:
            data = os.read(fd, 4096)
        except BlockingIOError:
            continue
        except OSError:
            return                      # the rig closed its end
        if not data:
            return
        out = [wire for piece in splitter.feed(data) for wire in answers.to(piece)]
        try:
            os.write(fd, b"".join(out))
        except BlockingIOError:
            pass                        # the rig is not reading: these answers are lost
        except OSError:
            return


async def serve_mqtt(host: str, port: int, sensors: str, commands: str,
                     answers: Answers) -> None:
    import aiomqtt
    async with aiomqtt.Client(host, port) as client:
        await client.subscribe(sensors, qos=0)
        print("wrong-encoding: ready", flush=True)
        while True:
            try:
                async with asyncio.timeout(3.0):
                    message = await anext(client.messages)
            except TimeoutError:
                return                  # the rig has stopped sending
            assert isinstance(message.payload, bytes)
            # an MQTT payload is the frame without COBS and delimiter (docs/mqtt_link.md)
            for wire in answers.to(cobs_encode(message.payload)):
                await client.publish(commands, cobs_decode(wire[:-1]), qos=0)


def main() -> None:
    mode = sys.argv[1]
    if mode == "pty":
        fd, link, scale = int(sys.argv[2]), sys.argv[3], float(sys.argv[4])
        answers = Answers(Encoding.I16 if link == "int16" else Encoding.F32, scale)
        serve_pty(fd, answers)
    else:
        host, port, sensors, commands, link, scale = sys.argv[2:8]
        answers = Answers(Encoding.I16 if link == "int16" else Encoding.F32, float(scale))
        asyncio.run(serve_mqtt(host, int(port), sensors, commands, answers))
    print(f"wrong-encoding: sent {answers.wrong}", flush=True)


if __name__ == "__main__":
    main()
