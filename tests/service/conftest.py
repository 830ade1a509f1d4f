"""Fixtures for the HTTP service tests: a registry with an uncalibrated model ("tile") and the same
model given a confidence ("tile-cal"), and a TestClient of an app with an API key and tight limits."""
import shutil

import pytest
from api_helpers import KEY, LIMITS, with_confidence
from fastapi.testclient import TestClient

from geotween.service.api import create_app
from geotween.service.registry import Registry
from geotween.service.settings import Settings


@pytest.fixture(scope="module")
def registry(tmp_path_factory, service_bundle):
    root = tmp_path_factory.mktemp("registry")
    reg = Registry.open(root)
    entry = reg.publish("tile", lambda folder: shutil.copytree(service_bundle, folder, dirs_exist_ok=True))
    reg.publish("tile-cal", lambda folder: with_confidence(entry.path, folder))
    return reg


@pytest.fixture(scope="module")
def client(registry):
    app = create_app(Settings(registry=registry.root, api_keys=[KEY], **LIMITS))
    with TestClient(app) as c:
        yield c
