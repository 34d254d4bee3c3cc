"""The seam between the offline and the runtime towers: the artifact format and its grammar.

Only numpy and the standard library are imported here, so the runtime never pulls in
sympy. The offline tower writes artifacts; the runtime tower reads them.

Public names
------------
load_artifact     read, verify (hash, plant file, consistency) and compile an artifact
Artifact          a loaded artifact: names, parameters, gains, limits, compiled programs
read_document     read and verify the JSON only
artifact_from_text  the same from text in memory (no plant-file check)
seal              add the content hash to a document and return its text
compile_program   grammar text -> fast Python function (math or numpy backend)
WATCHDOG_SETTINGS the one table of watchdog settings (unit, bounds, default, help);
watchdog_problem  its one check
"""

from linz_ros.artifact.compiler import Program, compile_program
from linz_ros.artifact.document import (FORMAT, FORMAT_VERSION, Artifact, artifact_from_text, content_hash,
                                        load_artifact, read_document, seal)
from linz_ros.artifact.watchdog import MAX_WATCHDOG_SECONDS, WATCHDOG_SETTINGS, watchdog_problem

__all__ = ["load_artifact", "artifact_from_text", "Artifact", "read_document", "seal", "content_hash", "compile_program",
           "Program", "FORMAT", "FORMAT_VERSION", "MAX_WATCHDOG_SECONDS",
           "WATCHDOG_SETTINGS", "watchdog_problem"]
