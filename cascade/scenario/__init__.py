"""The invented demo scenario (Tallowmere Rail Cooperative): synthetic lookup telemetry.

Used by the demo, the benchmarks and the tests, so every part of cascade can be exercised
on data that looks like a real lookup log without pointing at any real site.
"""

from cascade.scenario.telemetry import (
    CATEGORY_WEIGHTS,
    CATEGORY_WORDS,
    RESERVED_SUFFIXES,
    SHARED_HOSTS,
    SIGNALS,
    TELEMETRY_FIELDS,
    TelemetryRecord,
    generate_telemetry,
    read_telemetry_csv,
    write_telemetry_csv,
)

__all__ = [
    "CATEGORY_WEIGHTS",
    "CATEGORY_WORDS",
    "RESERVED_SUFFIXES",
    "SHARED_HOSTS",
    "SIGNALS",
    "TELEMETRY_FIELDS",
    "TelemetryRecord",
    "generate_telemetry",
    "read_telemetry_csv",
    "write_telemetry_csv",
]
