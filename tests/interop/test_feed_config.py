"""``[feed]`` keys of the CloudEvents conventions: ``event_source`` is an RFC 3986 URI-reference (CloudEvents 1.0.2
§3.1.1 "source": URI-reference), ``dataschema`` an absolute URI (§3.1.4), binary mode only with MQTT 5 (MQTT
binding §1.3)."""

from __future__ import annotations

from pathlib import Path

import pytest
from alarmkit import small_config

from edgevib.daemon.config import uri_reference_problem
from edgevib.daemon.interfaces import ConfigError


@pytest.mark.parametrize("value", ["edgevib/quarry-lane", "urn:fennick:quarry-lane:edgevib",
                                   "https://fennick.invalid/edgevib/quarry-lane", "/edgevib/quarry%20lane",
                                   "edgevib/quarry-lane?x=1#f"])
def test_uri_references_accepted(value: str) -> None:
    assert uri_reference_problem(value) is None  # RFC 3986 §4.1 URI-reference examples of each form


@pytest.mark.parametrize("value", ["", "quarry lane", "edgevib/50%", "1abc:def", "edgevib/<site>", "é/x"])
def test_not_uri_references_refused(value: str) -> None:
    assert uri_reference_problem(value) is not None


def test_event_source_template_validated(short_tmp: Path) -> None:
    with pytest.raises(ConfigError, match=r"event_source.*URI-reference"):
        small_config(short_tmp, feed={"url": "mqtt://127.0.0.1:1883", "event_source": "edgevib site {site}"})
    cfg = small_config(short_tmp, feed={"url": "mqtt://127.0.0.1:1883", "event_source": "urn:fennick:{site}"})
    assert cfg.alarm_settings.feed.event_source == "urn:fennick:quarry-lane"


def test_dataschema_must_be_absolute(short_tmp: Path) -> None:
    with pytest.raises(ConfigError, match=r"dataschema.*absolute"):
        small_config(short_tmp, feed={"url": "mqtt://127.0.0.1:1883", "dataschema": "schemas/{type}.json"})


def test_binary_mode_needs_mqtt5(short_tmp: Path) -> None:
    with pytest.raises(ConfigError, match=r"content_mode.*protocol"):
        small_config(short_tmp, feed={"url": "mqtt://127.0.0.1:1883", "content_mode": "binary"})
    cfg = small_config(short_tmp, feed={"url": "mqtt://127.0.0.1:1883", "protocol": "5", "content_mode": "binary"})
    assert cfg.alarm_settings.feed.content_mode == "binary"
