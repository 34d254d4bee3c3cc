"""Code generation: the grammar printer, the programs an artifact carries, the residual check."""

import pytest
import sympy as sp

from support import BUNDLED, MINIMAL, REFERENCE
from linz_ros.artifact.grammar import parse_expression
from linz_ros.codegen import CodegenError, build_document, symbolic_programs, to_grammar
from linz_ros.codegen import _writer
from linz_ros.model import load_plant, plant_from_text
from linz_ros.model._symbolic import tree_to_sympy
from linz_ros.synthesis import synthesise

x, y, z = sp.symbols("x y z", real=True)


@pytest.mark.parametrize("expr", [
    -x ** 2 / (3 * y), sp.sqrt(x) * sp.sec(y), x - y - z, -(x + y) * z, (x + y) ** -2, sp.Rational(-1, 3) * x,
    2 ** x, x ** sp.Rational(3, 2), x ** -sp.Rational(1, 2), sp.E * x, sp.pi * x / 2, -sp.Float(1.5) * x,
    x ** (y + 1), (-x) ** 3, sp.atan2(x, y) * sp.Abs(z), x / (y * z ** 2), -sp.Rational(2, 3) / x, (x * y) ** 2,
    -sp.sin(x) ** 2, sp.cot(x) + sp.csch(y), sp.sign(x) * sp.tanh(y),
])
def test_printed_text_parses_back_to_the_same_expression(expr):
    text = to_grammar(expr)
    back = tree_to_sympy(parse_expression(text), {"x": x, "y": y, "z": z})
    assert sp.simplify(back - expr) == 0, text


@pytest.mark.parametrize("value", [1.2345678901234567e-300, 0.1, 1 / 3, 6.02214076e23, 2.0 ** -1074])
def test_floats_keep_every_bit_of_their_float64_value(value):
    text = to_grammar(sp.Float(value) * x)
    assert float(parse_expression(text.split("*")[0])[1]) == value


@pytest.mark.parametrize("expr, words", [(sp.Piecewise((x, x > 0), (0, True)), "Piecewise"),
                                         (sp.Max(x, y), "Max"), (sp.I * x, "ImaginaryUnit"),
                                         (sp.Float("inf") * x, "Infinity"), (sp.nan * x, "NaN")])
def test_expressions_outside_the_grammar_are_refused(expr, words):
    with pytest.raises(CodegenError, match=words):
        to_grammar(expr)


def test_programs_of_an_input_state_design():
    design = synthesise(load_plant(REFERENCE / "khalil_two_state.yaml"))
    names = [p.name for p in symbolic_programs(design)]
    assert names == ["law", "dynamics", "transform", "inverse", "singular_set"]
    law = symbolic_programs(design)[0]
    assert [o[0] for o in law.outputs] == ["A", "b", "chain"] and law.outputs[0][1] == (1, 1)


def test_a_residual_above_the_tolerance_refuses_to_build(monkeypatch):
    design = synthesise(load_plant(BUNDLED / "mast_camera.yaml"))
    real = _writer._printed_program

    def slightly_wrong(program):
        printed = real(program)
        if program.name == "law":
            printed["outputs"][1][2][0] = f"({printed['outputs'][1][2][0]})*(1 + 1e-6)"
        return printed

    monkeypatch.setattr(_writer, "_printed_program", slightly_wrong)
    with pytest.raises(CodegenError, match="generated program 'law' differs from the symbolic expressions by "
                                           "[0-9.e-]+ \\(tolerance 1e-09\\) at pan=.*; artifact not written"):
        build_document(design)
    document, verification = build_document(design, tolerance=1e-3)
    assert 1e-7 < verification.per_program["law"]["max_relative_residual"] < 1e-5
    assert document["verification"]["max_relative_residual"] == verification.max_relative_residual


def test_a_program_that_cannot_be_checked_at_enough_points_is_refused():
    # log(x1) is real only for x1 > 0: most of this envelope gives no finite reference to check against
    text = (MINIMAL.replace("-k*sin(x1) + u", "-k*log(x1) + u") + "outputs: {y: x1}\n"
            "envelope: {x1: [-3.0, 0.5], x2: [-1.0, 1.0]}\noperating_point: {x1: 0.25, x2: 0.0}\n")
    design = synthesise(plant_from_text(text))
    with pytest.raises(CodegenError, match="generated program 'law' could be checked at only [0-9]+ of 64 envelope "
                                           "points .*; artifact not written"):
        build_document(design)
    narrowed = text.replace("x1: [-3.0, 0.5]", "x1: [0.05, 0.5]")
    _, verification = build_document(synthesise(plant_from_text(narrowed)))
    assert verification.skipped == 0 and verification.max_relative_residual < 1e-9


def test_cse_shares_work_across_the_law():
    design = synthesise(load_plant(BUNDLED / "pick_arm.yaml"))
    document, _ = build_document(design, points=8)
    law = document["programs"]["law"]
    temps = [text for _, text in law["temporaries"]]
    assert sum("cos(q2)" == t for t in temps) == 1          # computed once, used by A and b
    total_text = sum(len(t) for t in temps) + sum(len(e) for out in law["outputs"] for e in out[2])
    uncse = sum(len(str(e)) for e in list(design.A) + list(design.b))
    assert total_text < uncse / 3


def test_a_twelve_state_chain_beyond_the_symbolic_budget_builds_in_chain_form_and_tracks():
    from test_runtime_core import pendulum_chain_text

    from linz_ros.artifact import artifact_from_text, seal
    from linz_ros.runtime import SimSettings, make_reference, simulate
    design = synthesise(plant_from_text(pendulum_chain_text(6), "<chain6>"))
    assert design.law_form == "chain" and design.A is None and design.relative_degree == [12]
    document, verification = build_document(design, points=8)
    assert document["design"]["law_form"] == "chain"
    checked = verification.per_program["chain_law"]
    assert "symengine" in checked["reference"] and checked["max_relative_residual"] < 1e-12
    artifact = artifact_from_text(seal(document))
    # the smooth move is a degree-25 polynomial whose 12th derivative scales as duration^-12: 3 s keeps th1 inside
    reference = make_reference("smooth", [12], [0.0], 0.001, at=0.1, duration=3.0)
    result = simulate(artifact, SimSettings(duration=3.2, reference=reference))
    assert result.summary()["verdict"] == "tracked"
