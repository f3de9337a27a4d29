"""Python client of the Foray planning service.

    from foray_client import RobotSession, load_spec
    identity = RobotSession.load_or_register("robot.identity", "127.0.0.1:50151",
                                             "foray-data/admin-token", load_spec("robot.json"))
    with RobotSession("127.0.0.1:50151", identity.robot_id, identity.token) as session:
        ...

`foray_client.probe` checks a server's health without generated stubs. See
examples/robot_loop.py for a complete control loop. Foray is not a safety system.
"""

__version__ = "0.1.0"


def __getattr__(name):
    # The session needs the generated modules; the probe does not, so they load on first use.
    if name in ("RobotSession", "Plan", "Decision", "Identity", "ForayError"):
        from . import session
        return getattr(session, name)
    if name in ("load_spec", "spec_from_dict"):
        from . import spec
        return getattr(spec, name)
    raise AttributeError(f"module 'foray_client' has no attribute {name!r}")
