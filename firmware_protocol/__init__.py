"""The clampcore wire protocol between the host and a serial DAQ board.

``PROTOCOL.md`` is the specification (version 1).  Modules:

* ``firmware_protocol.codec`` - host codec: compiled per-sample path (deframer,
  SAMPLE decoder, COMMAND encoder) and plain helpers for the rare messages.
* ``firmware_protocol.cboard`` - build and start the C parts (core library, fuzz
  driver, the pseudo-terminal board ``build_pty_board`` / ``start_pty_board``).
* ``firmware_protocol.cbinding`` - ctypes binding of the C core on its in-memory port.
* ``firmware_protocol.fuzz`` - mutated-frame fuzzing of both decoders.

``c/`` holds the portable C board core (``ccb.h``, ``ccb_core.c``) and its ports;
``vectors/`` the test vectors both implementations pass.
"""
