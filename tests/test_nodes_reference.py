"""The reference node in-process (no DDS): a backward jump of simulated time."""

import pytest

rclpy = pytest.importorskip("rclpy", reason="rclpy is not installed (pip install '.[ros]')")

from rclpy.time import Time  # noqa: E402

from support import BUNDLED  # noqa: E402


@pytest.fixture
def make(tmp_path):
    from linz_ros.codegen import artifact_path, build_document, write_artifact
    from linz_ros.model import load_plant
    from linz_ros.nodes.reference import ReferenceNode
    from linz_ros.synthesis import synthesise
    path = write_artifact(build_document(synthesise(load_plant(BUNDLED / "pick_arm.yaml")), points=8)[0],
                          artifact_path(tmp_path, "pick_arm"))
    made = []

    def _make(**parameters):
        context = rclpy.Context()
        args = ["--ros-args", "-p", f"artifact:={path}", "-p", "use_sim_time:=true"]
        for key, value in parameters.items():
            args += ["-p", f"{key}:={value}"]
        rclpy.init(args=args, context=context)
        node = ReferenceNode(context=context)
        made.append((node, context))
        return node

    yield _make
    for node, context in made:
        node.destroy_node()
        context.try_shutdown()


def test_when_simulated_time_jumps_back_the_move_goes_on_where_it_was(make):
    node = make(reference="'smooth:tool_x=0.1,duration=2.0,at=0.0'")
    published = []
    node.publisher.publish = published.append
    clock = node.get_clock()
    clock.set_ros_time_override(Time(seconds=10.0, clock_type=clock.clock_type))
    node.start = 9.0                                   # the move began a second ago
    node._tick()
    clock.set_ros_time_override(Time(seconds=4.0, clock_type=clock.clock_type))   # a simulation reset
    assert node.start == pytest.approx(3.0)
    node._tick()
    assert list(published[1].data) == pytest.approx(list(published[0].data))      # one second in, still
    clock.set_ros_time_override(Time(seconds=4.0005, clock_type=clock.clock_type))
    clock.set_ros_time_override(Time(seconds=4.0, clock_type=clock.clock_type))   # under 1 ms: left alone
    assert node.start == pytest.approx(3.0)


def test_for_an_extended_artifact_the_reference_is_of_its_outputs_from_the_plants_operating_point(tmp_path):
    # the delivery cart: states x, y, th and the compensator's v_i1; outputs cart_x, cart_y of relative degree 2
    from linz_ros.codegen import artifact_path, build_document, write_artifact
    from linz_ros.model import load_plant
    from linz_ros.nodes.reference import ReferenceNode
    from linz_ros.synthesis import synthesise
    path = write_artifact(build_document(synthesise(load_plant(BUNDLED / "delivery_cart.yaml")), points=8)[0],
                          artifact_path(tmp_path, "delivery_cart"))
    context = rclpy.Context()
    rclpy.init(args=["--ros-args", "-p", f"artifact:={path}", "-p", "reference:='eight:amplitude=2.0,period=40.0'"],
               context=context)
    node = ReferenceNode(context=context)
    try:
        published = []
        node.publisher.publish = published.append
        node.start = node._now() - 10.0                # a quarter of the eight in: x = a sin(w t) at its top
        node._tick()
        assert node.labels == ["cart_x", "cart_x'", "cart_x''", "cart_y", "cart_y'", "cart_y''"]
        assert published[0].data[0] == pytest.approx(2.0, abs=1e-3)
        assert published[0].data[1] == pytest.approx(0.0, abs=1e-3)
    finally:
        node.destroy_node()
        context.try_shutdown()
