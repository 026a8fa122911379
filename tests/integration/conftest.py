import pytest

from tests.integration.kafka import Broker


@pytest.fixture(scope="session")
def broker():
    b = Broker().start()
    yield b
    b.stop()
