import pytest


@pytest.fixture(scope="module")
def win(qapp):
    """One live window on the built-in demo for a test module (opening one costs a second);
    the module's tests leave it in a valid state for the next."""
    from livefilt.config import demo_config
    from livefilt.stream.engine import Engine
    from livefilt.window import MainWindow

    engine = Engine(demo_config(), tap_seconds=60)
    w = MainWindow(engine)
    engine.start()
    w.show()
    yield w
    w.close()
    assert engine.error is None
