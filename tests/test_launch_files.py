"""The launch files, read without importing ``launch``: everything they name exists as installed.

A renamed console script, parameter file or bundled plant must not silently break a
bringup on a machine with ROS 2; this reads each launch file's syntax tree and checks its
executables against setup.py's console scripts and its files against setup.py's data files.
"""

import ast
import glob
from pathlib import Path

import pytest
import yaml

from support import ROOT

LAUNCH_FILES = sorted((ROOT / "launch").glob("*.launch.py"))


def _setup_keywords():
    tree = ast.parse((ROOT / "setup.py").read_text())
    call = next(n for n in ast.walk(tree) if isinstance(n, ast.Call) and getattr(n.func, "id", "") == "setup")
    return call, {k.arg: k.value for k in call.keywords}


def _console_scripts() -> dict[str, str]:
    _, keywords = _setup_keywords()
    entry_points = ast.literal_eval(keywords["entry_points"])
    return dict(line.replace(" ", "").split("=") for line in entry_points["console_scripts"])


def _installed_share_files() -> set[str]:
    """Paths under share/linz_ros that setup.py's data_files install (globs evaluated here)."""
    _, keywords = _setup_keywords()
    installed = set()
    # our own setup.py, evaluated with its one name and a glob rooted at the checkout
    scope = {"package_name": "linz_ros", "glob": lambda pattern: glob.glob(str(ROOT / pattern))}
    data_files = eval(compile(ast.Expression(keywords["data_files"]), "setup.py", "eval"), scope)  # noqa: S307
    for target, files in data_files:
        for f in files:
            installed.add(f"{target}/{Path(f).name}")
    return {p.removeprefix("share/linz_ros/") for p in installed if p.startswith("share/linz_ros/")}


def _calls(tree, name):
    return [n for n in ast.walk(tree) if isinstance(n, ast.Call) and getattr(n.func, "id", "") == name]


def _keyword(call, name):
    return next((k.value for k in call.keywords if k.arg == name), None)


@pytest.mark.parametrize("path", LAUNCH_FILES, ids=lambda p: p.name)
def test_every_executable_a_launch_file_starts_is_a_console_script_that_imports(path):
    tree = ast.parse(path.read_text())
    scripts = _console_scripts()
    nodes = _calls(tree, "Node") + _calls(tree, "LifecycleNode")
    assert nodes, "a bringup without nodes"
    constants = {t.id: n.value.value for n in tree.body if isinstance(n, ast.Assign)
                 for t in n.targets if isinstance(t, ast.Name) and isinstance(n.value, ast.Constant)}
    for node in nodes:
        package = _keyword(node, "package")
        assert (package.value if isinstance(package, ast.Constant) else constants[package.id]) == "linz_ros"
        executable = ast.literal_eval(_keyword(node, "executable"))
        assert executable in scripts, f"{path.name} starts {executable!r}, not a console script of setup.py"
        module, function = scripts[executable].split(":")
        imported = __import__(module, fromlist=[function])
        assert callable(getattr(imported, function))


def _launch_configurations(tree) -> dict[str, str]:
    """Variable name -> launch argument name, for ``plant = LaunchConfiguration("plant")``."""
    out = {}
    for node in ast.walk(tree):
        if isinstance(node, ast.Assign) and isinstance(node.value, ast.Call) \
                and getattr(node.value.func, "id", "") == "LaunchConfiguration":
            out.update({t.id: node.value.args[0].value for t in node.targets if isinstance(t, ast.Name)})
    return out


def _joined_paths(tree, defaults, configurations) -> list[str]:
    """Every ``PathJoinSubstitution([FindPackageShare(...), ...])`` resolved with the arguments'
    defaults, with a ``.yaml`` that follows it in a list appended."""
    suffix_of = {}
    for node in ast.walk(tree):
        if isinstance(node, ast.List):
            for first, second in zip(node.elts, node.elts[1:]):
                if isinstance(second, ast.Constant) and isinstance(second.value, str):
                    suffix_of[id(first)] = second.value
    paths = []
    for join in _calls(tree, "PathJoinSubstitution"):
        parts = []
        for part in join.args[0].elts[1:]:               # after FindPackageShare(PACKAGE)
            if isinstance(part, ast.Constant):
                parts.append(part.value)
            else:
                parts.append(ast.literal_eval(defaults[configurations[part.id]]))
        paths.append("/".join(parts) + suffix_of.get(id(join), ""))
    return paths


@pytest.mark.parametrize("path", LAUNCH_FILES, ids=lambda p: p.name)
def test_parameter_and_plant_files_a_launch_file_names_are_installed(path):
    tree = ast.parse(path.read_text())
    installed = _installed_share_files()
    assert "package.xml" in installed and f"launch/{path.name}" in installed
    defaults = {ast.literal_eval(c.args[0]): _keyword(c, "default_value") for c in _calls(tree, "DeclareLaunchArgument")
                if c.args and isinstance(c.args[0], ast.Constant)}
    paths = _joined_paths(tree, defaults, _launch_configurations(tree))
    assert paths, f"{path.name} names no parameter file"
    for relative in paths:
        assert relative in installed, f"{path.name} names share/linz_ros/{relative}, which setup.py does not install"
    if "plant" in defaults:
        plant = ast.literal_eval(defaults["plant"])
        assert f"config/plants/{plant}.yaml" in installed


def test_every_bundled_plant_has_a_bringup_parameter_file_for_its_nodes():
    installed = _installed_share_files()
    for plant in sorted((ROOT / "config" / "plants").glob("*.yaml")):
        params = ROOT / "config" / f"{plant.stem}.yaml"
        assert f"config/{plant.stem}.yaml" in installed, f"no config/{plant.stem}.yaml for plant:={plant.stem}"
        document = yaml.safe_load(params.read_text())
        for node in ("/linz_controller", "/linz_plant_sim", "/linz_reference"):
            assert "ros__parameters" in document[node], (params.name, node)
        controller, simulator = document["/linz_controller"]["ros__parameters"], document["/linz_plant_sim"]["ros__parameters"]
        for key in ("state_topic", "state_type", "state_fields", "command_topic", "command_type", "command_fields"):
            assert controller[key] == simulator[key], (params.name, key)
        assert document["/linz_reference"]["ros__parameters"]["topic"] == controller["reference_topic"]


@pytest.mark.parametrize("plant", sorted(p.stem for p in (ROOT / "config" / "plants").glob("*.yaml")))
def test_every_bringup_simulates_at_its_plants_design_rate(plant):
    # one state per control period: a simulator at another rate makes the controller step at the
    # simulator's rate, and a run's summary count steps in the wrong periods (the elastic arm's
    # simulator once ran at 500 Hz under a 2 kHz design)
    design = yaml.safe_load((ROOT / "config" / "plants" / f"{plant}.yaml").read_text())["design"]
    simulator = yaml.safe_load((ROOT / "config" / f"{plant}.yaml").read_text())["/linz_plant_sim"]["ros__parameters"]
    assert float(simulator["rate"]) == float(design["rate"]), (plant, simulator["rate"], design["rate"])


def _load_with_stand_in_launch(path: Path, monkeypatch):
    """The launch file as a module, with ``launch``/``launch_ros`` replaced by recording stand-ins."""
    import importlib.util
    import types

    class Recorded:
        def __init__(self, *args, **kwargs):
            self.args, self.kwargs = args, kwargs

    class LaunchConfiguration(Recorded):
        def perform(self, context):
            return context[self.args[0]]

    stand_ins = {"launch": {"LaunchDescription": Recorded}, "launch.actions": {
        "DeclareLaunchArgument": Recorded, "OpaqueFunction": Recorded, "IncludeLaunchDescription": Recorded},
        "launch.substitutions": {"LaunchConfiguration": LaunchConfiguration, "PathJoinSubstitution": Recorded},
        "launch.launch_description_sources": {"PythonLaunchDescriptionSource": Recorded},
        "launch_ros": {}, "launch_ros.actions": {"LifecycleNode": Recorded, "Node": Recorded},
        "launch_ros.substitutions": {"FindPackageShare": Recorded}}
    for name, members in stand_ins.items():
        module = types.ModuleType(name)
        module.__dict__.update(members)
        monkeypatch.setitem(__import__("sys").modules, name, module)
    spec = importlib.util.spec_from_file_location(path.stem.replace(".", "_"), path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_the_hardware_bringup_remaps_the_parameter_files_topics(monkeypatch):
    bringup = _load_with_stand_in_launch(ROOT / "launch" / "hardware_bringup.launch.py", monkeypatch)
    declared = {a.args[0]: a.kwargs.get("default_value") for a in bringup.generate_launch_description().args[0]
                if type(a).__name__ == "Recorded" and a.args and isinstance(a.args[0], str)}
    assert {"artifact", "params_file", "state_topic", "command_topic", "reference_topic", "remaps"} <= set(declared)
    context = {"artifact": "/tmp/arm.artifact.json", "params_file": str(ROOT / "config" / "pick_arm.yaml"),
               "autostart": "false", "field_log_folder": "", "state_topic": "/robot/joints",
               "command_topic": "/robot/efforts", "reference_topic": "", "remaps": "/diagnostics:=/robot/diagnostics"}
    (node,) = bringup._controller(context)
    assert node.kwargs["executable"] == "linz_controller"
    assert node.kwargs["remappings"] == [("/pick_arm/joint_states", "/robot/joints"),
                                         ("/pick_arm/joint_efforts", "/robot/efforts"),
                                         ("/diagnostics", "/robot/diagnostics")]
    params_file, overrides = node.kwargs["parameters"]
    assert params_file == context["params_file"] and overrides["autostart"] is False
    assert "state_topic" not in overrides              # remapped, not overridden
    with pytest.raises(RuntimeError, match="remaps: expected FROM:=TO, got '/diagnostics'"):
        bringup._controller({**context, "remaps": "/diagnostics"})
