"""Config loading: the example loads; every class of mistake names file and key path."""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import pytest
import yaml

from arxwatch.daemon.cli import main
from arxwatch.daemon.config import ConfigError, load_config, parse_config, read_secret
from arxwatch.daemon.route import Refused, Route

EXAMPLE = Path(__file__).resolve().parents[2] / "config" / "site-example.yaml"
SECRET = "s3cret-not-for-logs"


def base() -> dict[str, Any]:
    """Return a small valid config as a mapping, for tests to break."""
    return {
        "broker": {"host": "127.0.0.1", "client_id": "test-0"},
        "asset_classes": [
            {
                "name": "vav",
                "pattern": "yard/{building}/vav/{asset}/{signal}",
                "asset_id": "{building}/{asset}",
                "sample_period_s": 60,
                "output": {
                    "signal": "zone-temp",
                    "name": "zone temperature",
                    "unit": "degC",
                    "min": 5,
                    "max": 40,
                },
                "inputs": [
                    {"signal": "reheat", "name": "reheat valve", "unit": "%", "min": 0, "max": 100}
                ],
                "model": {"na": 1, "nb": 1, "nk": 1},
                "baseline": {"learn_for_s": 86400},
            }
        ],
    }


def parse(data: dict[str, Any]) -> None:
    parse_config(yaml.safe_dump(data, sort_keys=False), "site.yaml")


def test_example_loads_and_builds_every_derived_object() -> None:
    config = load_config(EXAMPLE)
    assert config.subscriptions() == ("larkspur/+/ahu/+/+", "larkspur/+/vav/+/+")
    assert config.broker.port == 8883 and config.broker.tls is not None
    ahu, vav = config.asset_classes
    assert ahu.payload_format("fan-speed").scale == 100.0
    assert ahu.payload_format("sat").scale == 1.0
    assert ahu.align_config().signals == ("sat", "chw-valve", "fan-speed", "mode")
    assert ahu.monitor_config().rls.forgetting == 0.998
    assert ahu.model.order is not None and ahu.model.order.nk == (1, 2)
    assert vav.model.auto and vav.payload_format().kind == "number"
    assert ahu.signal_names().inputs == ("cooling valve", "supply fan speed")
    router = config.router()
    assert router.route("larkspur/block-c/vav/v-3-14/damper") == Route(
        "vav", "block-c/v-3-14", "damper"
    )
    assert router.route("larkspur/block-c/vav/v-3-14/setpoint") == Refused(
        "signal not allowed", "vav"
    )


def test_defaults_of_a_minimal_config() -> None:
    config = parse_config(yaml.safe_dump(base()), "site.yaml")
    assert config.broker.port == 1883 and config.broker.qos == 1
    assert config.topics.status == "arxwatch/test-0/status"
    assert config.topics.events_topic("b/v1") == "arxwatch/alerts/b/v1/events"
    assert (config.metrics.host, config.metrics.port) == ("127.0.0.1", 9108)
    assert config.limits.max_payload_bytes == 4096


def test_unknown_key_suggests_the_close_one() -> None:
    data = base()
    data["broker"]["prot"] = 1883
    with pytest.raises(
        ConfigError,
        match=r"site\.yaml: broker\.prot: unknown key; "
        r"did you mean 'port'\?",
    ):
        parse(data)


def test_unknown_key_deep_in_a_list_names_the_index() -> None:
    data = base()
    data["asset_classes"][0]["inputs"][0]["delay_samples"] = 2
    with pytest.raises(
        ConfigError, match=re.escape("site.yaml: asset_classes[0].inputs[0].delay_samples")
    ):
        parse(data)


def test_wrong_type_names_value_and_expectation() -> None:
    data = base()
    data["asset_classes"][0]["sample_period_s"] = "60"
    with pytest.raises(
        ConfigError,
        match=re.escape(
            "site.yaml: asset_classes[0].sample_period_s: expected a finite number > 0, "
            "found '60' (a string)"
        ),
    ):
        parse(data)


def test_bool_is_not_an_integer() -> None:
    data = base()
    data["limits"] = {"max_assets": True}
    with pytest.raises(
        ConfigError,
        match=r"limits\.max_assets: expected an integer >= 1, "
        r"found True \(a boolean\)",
    ):
        parse(data)


def test_duplicate_key_is_refused_with_its_line() -> None:
    text = yaml.safe_dump(base(), sort_keys=False).replace(
        "  client_id: test-0\n", "  client_id: test-0\n  host: 10.0.0.9\n"
    )
    line = text.splitlines().index("  host: 10.0.0.9") + 1
    with pytest.raises(
        ConfigError,
        match=rf"site\.yaml: line {line}: duplicate key 'host' "
        r"\(first at line 2\)",
    ):
        parse_config(text, "site.yaml")


def test_impossible_order_is_reported_at_the_model() -> None:
    data = base()
    data["asset_classes"][0]["model"] = {"na": 1, "nb": 0, "nk": 1}
    with pytest.raises(
        ConfigError,
        match=re.escape(
            "site.yaml: asset_classes[0].model: impossible model order: nb[0] must be in"
        ),
    ):
        parse(data)


def test_order_list_must_have_one_entry_per_input() -> None:
    data = base()
    data["asset_classes"][0]["model"] = {"na": 1, "nb": [1, 2], "nk": 1}
    with pytest.raises(
        ConfigError,
        match=re.escape("asset_classes[0].model.nb: expected an integer or a list of 1 integers"),
    ):
        parse(data)


def test_malformed_topic_pattern_is_reported_with_the_route_message() -> None:
    data = base()
    data["asset_classes"][0]["pattern"] = "yard/+/vav/{asset}/{signal}"
    with pytest.raises(
        ConfigError,
        match=re.escape(
            "site.yaml: asset_classes[0].pattern: topic pattern 'yard/+/vav/{asset}/{signal}': "
            "wildcards are not allowed"
        ),
    ):
        parse(data)


def test_unused_pattern_level_is_reported_at_asset_id() -> None:
    data = base()
    data["asset_classes"][0]["asset_id"] = "{asset}"
    with pytest.raises(ConfigError, match=r"asset_classes\[0\]\.asset_id: .*\{building\}"):
        parse(data)


def test_password_key_is_refused_with_the_alternatives() -> None:
    data = base()
    data["broker"]["password"] = SECRET
    with pytest.raises(
        ConfigError, match=r"broker\.password: .*password_file.*password_env"
    ) as caught:
        parse(data)
    assert SECRET not in str(caught.value)


def test_password_without_tls_is_refused_unless_allowed() -> None:
    data = base()
    data["broker"].update(username="u", password_env="MQTT_PASSWORD")
    with pytest.raises(
        ConfigError,
        match=r"broker\.password_env: a password without TLS .*"
        r"allow_plaintext_password: true",
    ):
        parse(data)
    data["broker"]["allow_plaintext_password"] = True
    parse(data)


def test_tls_file_must_exist(tmp_path: Path) -> None:
    data = base()
    data["broker"]["tls"] = {"ca_file": str(tmp_path / "ca.pem")}
    with pytest.raises(ConfigError, match=r"broker\.tls\.ca_file: file .*ca\.pem' does not exist"):
        parse(data)


@pytest.mark.parametrize("port", [0, 65536, "1883"])
def test_bad_port(port: object) -> None:
    data = base()
    data["broker"]["port"] = port
    with pytest.raises(
        ConfigError,
        match=r"site\.yaml: broker\.port: expected an integer "
        r"in 1\.\.65535",
    ):
        parse(data)


@pytest.mark.parametrize("listen", ["9108", "127.0.0.1:70000", "bad host:9108", "[nope]:1"])
def test_bad_listen(listen: str) -> None:
    data = base()
    data["metrics"] = {"listen": listen}
    with pytest.raises(ConfigError, match=r"site\.yaml: metrics\.listen: expected"):
        parse(data)


def test_ipv6_listen_is_accepted() -> None:
    data = base()
    data["metrics"] = {"listen": "[::1]:9200"}
    config = parse_config(yaml.safe_dump(data), "site.yaml")
    assert config.metrics.listen == "[::1]:9200"


def test_python_tags_are_refused() -> None:
    with pytest.raises(ConfigError, match=r"site\.yaml: line 1: .*python/object"):
        parse_config("broker: !!python/object/apply:os.system ['true']\n", "site.yaml")


def test_missing_file_names_it(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match=r"nope\.yaml: cannot read the file"):
        load_config(tmp_path / "nope.yaml")


def _with_password(tmp_path: Path, **broker: object) -> Path:
    data = base()
    data["broker"].update(username="u", allow_plaintext_password=True, **broker)
    path = tmp_path / "site.yaml"
    path.write_text(yaml.safe_dump(data), encoding="utf-8")
    return path


def test_read_secret_from_a_file(tmp_path: Path) -> None:
    secret_file = tmp_path / "mqtt-password"
    secret_file.write_text(SECRET + "\n", encoding="utf-8")
    config = load_config(_with_password(tmp_path, password_file=str(secret_file)))
    assert read_secret(config, {}) == SECRET
    assert SECRET not in repr(config)


def test_read_secret_from_the_given_environment(tmp_path: Path) -> None:
    config = load_config(_with_password(tmp_path, password_env="MQTT_PASSWORD"))
    assert read_secret(config, {"MQTT_PASSWORD": SECRET}) == SECRET


def test_read_secret_missing_variable_names_it_and_shows_no_secret(tmp_path: Path) -> None:
    config = load_config(_with_password(tmp_path, password_env="MQTT_PASSWORD"))
    with pytest.raises(
        ConfigError,
        match=r"site\.yaml: broker\.password_env: environment "
        r"variable 'MQTT_PASSWORD' is not set",
    ) as caught:
        read_secret(config, {"OTHER": SECRET})
    assert SECRET not in str(caught.value)


def test_read_secret_without_password_is_none() -> None:
    assert read_secret(parse_config(yaml.safe_dump(base()), "site.yaml"), {}) is None


def test_check_command_on_the_example(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["check", "--config", str(EXAMPLE)]) == 0
    out = capsys.readouterr().out
    assert "subscriptions:" in out and "larkspur/+/vav/+/+" in out
    assert "127.0.0.1:9108" in out and "/var/lib/arxwatch/state.db" in out
    assert "chw-valve" in out and "ARXWATCH_MQTT_PASSWORD" in out


def test_check_command_prints_no_secret(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    secret_file = tmp_path / "mqtt-password"
    secret_file.write_text(SECRET, encoding="utf-8")
    path = _with_password(tmp_path, password_file=str(secret_file))
    assert main(["check", "--config", str(path)]) == 0
    captured = capsys.readouterr()
    assert SECRET not in captured.out + captured.err


def test_check_command_on_a_bad_file(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    data = base()
    data["broker"]["keepalive"] = 30
    path = tmp_path / "bad.yaml"
    path.write_text(yaml.safe_dump(data), encoding="utf-8")
    assert main(["check", "--config", str(path)]) == 2
    captured = capsys.readouterr()
    assert captured.out == ""
    assert "bad.yaml: broker.keepalive: unknown key; did you mean 'keepalive_s'?" in captured.err


def test_learning_per_mode_needs_the_mode_labels() -> None:
    text = (
        Path(EXAMPLE)
        .read_text()
        .replace(
            "      values: [occupied, unoccupied, economiser]\n",
            "",
        )
    )
    with pytest.raises(ConfigError, match=r"asset_classes\[0\]\.mode\.values: learning a baseline"):
        parse_config(text, "site.yaml")


def test_alignment_windows_can_be_set_per_class() -> None:
    text = (
        Path(EXAMPLE)
        .read_text()
        .replace(
            "    sample_period_s: 60\n    output:\n      signal: zone-temp",
            "    sample_period_s: 60\n    align: {lateness_s: 2.5, gap_restart_s: 600}\n"
            "    output:\n      signal: zone-temp",
        )
    )
    vav = parse_config(text, "site.yaml").asset_classes[1].align_config()
    assert (vav.lateness_s, vav.gap_restart_s, vav.staleness_s) == (2.5, 600.0, 120.0)
    bad = text.replace("gap_restart_s: 600", "gap_restart_s: 30")
    with pytest.raises(ConfigError, match=r"asset_classes\[1\]\.align: gap_restart_s must be >="):
        parse_config(bad, "site.yaml")


def test_reference_samples_sets_the_start_of_judging_and_is_checked() -> None:
    data = base()
    data["asset_classes"][0]["detectors"] = {"reference_samples": 120}
    config = parse_config(yaml.safe_dump(data, sort_keys=False), "site.yaml")
    assert config.asset_classes[0].monitor_config().prewhiten.reference_samples == 120
    # the prewhitening filter (AR order 6) needs more than 10 samples per coefficient
    data["asset_classes"][0]["detectors"] = {"reference_samples": 50}
    with pytest.raises(ConfigError, match=r"detectors\.reference_samples: .*must exceed 10"):
        parse(data)


def test_alert_lifecycle_is_set_per_class_and_checked_together() -> None:
    data = base()
    data["asset_classes"][0]["detectors"] = {"raise_m": 6, "raise_n": 8, "clear_n": 4}
    config = parse_config(yaml.safe_dump(data, sort_keys=False), "site.yaml")
    policy = config.asset_classes[0].monitor_config().policy
    assert (policy.raise_m, policy.raise_n, policy.clear_n) == (6, 8, 4)
    assert policy.clear_after_s == 3600.0  # the default off-delay stays
    data["asset_classes"][0]["detectors"] = {"clear_after_s": 900}
    config = parse_config(yaml.safe_dump(data, sort_keys=False), "site.yaml")
    monitor = config.asset_classes[0].monitor_config()
    assert monitor.policy.clear_after_s == 900.0 and monitor.quality_policy.clear_after_s == 0.0
    data["asset_classes"][0]["detectors"] = {"clear_after_s": -5}
    with pytest.raises(ConfigError, match=r"detectors: clear_after_s must be finite and >= 0"):
        parse(data)
    # 6 of the default 5 cannot be: the error names both settings
    data["asset_classes"][0]["detectors"] = {"raise_m": 6}
    with pytest.raises(ConfigError, match=r"detectors: raise_m \(6\) cannot exceed raise_n \(5\)"):
        parse(data)
    data["asset_classes"][0]["detectors"] = {"clear_n": 0}
    with pytest.raises(ConfigError, match=r"detectors\.clear_n"):
        parse(data)


def test_band_tolerances_are_set_per_class_and_checked() -> None:
    data = base()
    data["asset_classes"][0]["detectors"] = {"dead_time_tolerance": 0.3, "gain_tolerance": 0.2}
    config = parse_config(yaml.safe_dump(data, sort_keys=False), "site.yaml")
    bands = config.asset_classes[0].monitor_config().bands
    assert (bands.dead_time_tolerance, bands.gain_tolerance) == (0.3, 0.2)
    assert bands.time_constant_tolerance == 0.5  # the default stays
    data["asset_classes"][0]["detectors"] = {"dead_time_tolerance": 0}
    with pytest.raises(ConfigError, match=r"dead_time_tolerance must be a finite number > 0"):
        parse(data)
