"""Cost of the field log per control step, against references measured in the same run.

Times, per record: the packed CDR encoding against mcap_ros2's generic serializer (the
same bytes), the control thread's share (``FieldLogWriter.put``) against one
``ControllerCore.step`` of the pick arm, and the whole cost of a record (both threads:
encode, MCAP, LZ4, disk; the GIL makes it all one budget). Goal: a record costs less
than two core steps, everything included.

Run:  python benchmarks/field_log_cost.py [--records 50000]
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))

from support import BUNDLED, built_artifact  # noqa: E402
from linz_ros.runtime import ControllerCore, WatchdogConfig  # noqa: E402
from linz_ros.runtime.fieldlog import (FLOAT64_MULTIARRAY_DEFINITION, FieldLogSettings,  # noqa: E402
                                       encode_labelled_array, open_field_log)
from linz_ros.runtime.steprecord import record_labels  # noqa: E402


def per_call(function, n: int) -> float:
    """Microseconds per call, the best of three rounds."""
    best = float("inf")
    for _ in range(3):
        start = time.perf_counter()
        for _ in range(n):
            function()
        best = min(best, (time.perf_counter() - start) / n * 1e6)
    return best


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--records", type=int, default=50000)
    n = parser.parse_args().records
    from mcap_ros2._dynamic import serialize_dynamic      # the generic encoder behind mcap_ros2's Writer

    artifact = built_artifact(BUNDLED / "pick_arm.yaml")
    labels = record_labels(artifact, states=True)
    label, row = ",".join(labels), [0.125] * len(labels)
    generic = serialize_dynamic("std_msgs/msg/Float64MultiArray", FLOAT64_MULTIARRAY_DEFINITION)[
        "std_msgs/msg/Float64MultiArray"]
    message = {"layout": {"dim": [{"label": label, "size": len(row), "stride": len(row)}], "data_offset": 0},
               "data": row}
    assert generic(message) == encode_labelled_array(label, row)
    packed = per_call(lambda: encode_labelled_array(label, row), n // 5)
    general = per_call(lambda: generic(message), n // 5)

    core = ControllerCore(artifact)
    x, ref = [0.4, 1.2, 0.0, 0.0], [0.0] * core.reference_size
    clock = iter(range(10**9))
    step = per_call(lambda: core.step(x, ref, 0.002 * next(clock), 0.002 * next(clock)), n // 5)

    folder = Path(tempfile.mkdtemp(prefix="linz_field_log_cost_"))
    writer = open_field_log(FieldLogSettings(folder, queue_size=n + 10), artifact, WatchdogConfig.from_artifact(artifact))
    start = time.perf_counter()
    for _ in range(n):
        writer.put(row)
    put = (time.perf_counter() - start) / n * 1e6
    status = writer.close(timeout=120)
    whole = (time.perf_counter() - start) / n * 1e6
    size = sum(f.stat().st_size for f in status.files) / n
    print(f"records: {n}, {len(labels)} fields, {size:.0f} bytes per record on disk (LZ4)")
    print(f"  encode: packed {packed:.2f} us, mcap_ros2 generic {general:.2f} us  (generic / packed {general / packed:.1f})")
    print(f"  control thread: put {put:.2f} us (with the writer thread running), core step {step:.2f} us "
          f"(put / step {put / step:.2f})")
    print(f"  all in: {whole:.2f} us per record ({1e6 / whole:.0f} records/s; dropped {status.dropped}); "
          f"record / step {whole / step:.2f} (goal < 2)")


if __name__ == "__main__":
    main()
