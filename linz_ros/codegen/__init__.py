"""Code generation: turn a Design into a verified, data-only controller artifact.

Public names
------------
to_grammar         sympy expression -> text of the artifact grammar
symbolic_programs  the programs an artifact carries (law, dynamics, transform, ...)
build_document     Design -> (artifact document, verification); refuses a large residual
write_artifact     seal the document with its hash and write it atomically
artifact_path      where ``linz build`` puts a plant's artifact
verify_programs    generated programs against sympy at random envelope points
CodegenError       an expression or residual that cannot go into an artifact
"""

from linz_ros.codegen._printer import CodegenError, to_grammar
from linz_ros.codegen._verify import DEFAULT_TOLERANCE, Verification, verify_programs
from linz_ros.codegen._writer import (SymbolicProgram, artifact_path, build_document, symbolic_programs,
                                      write_artifact)

__all__ = ["to_grammar", "CodegenError", "symbolic_programs", "build_document", "write_artifact",
           "artifact_path", "verify_programs", "Verification", "SymbolicProgram", "DEFAULT_TOLERANCE"]
