"""The seam between the offline and the runtime towers: the artifact format and its grammar.

Only numpy and the standard library are imported here, so the runtime never pulls in
sympy. The offline tower writes artifacts; the runtime tower reads them.
"""
