"""docker/: the compose file, the proxy's configuration and the image agree.

No container engine runs here, so the files are checked as data: compose.yaml
parsed as YAML, the nginx template rendered as the nginx image does (its
envsubst step replaces only variables set in the container's environment) and
read for the directives that matter. ``nginx -t`` on the rendered file is
part of the development checks in docs/transport.md, not of this test. Our
own contract; the directive names are nginx's (nginx.org, ngx_http_core_module).
"""

from __future__ import annotations

import json
import re
from pathlib import Path
from typing import Any

import yaml

from service.config import setting
from service.web.headers import SECURITY_HEADERS

DOCKER = Path(__file__).resolve().parents[2] / "docker"
LIMITS = {"KEELSON_MAX_BODY_BYTES": "client_max_body_size",
          "KEELSON_HEADER_TIMEOUT": "client_header_timeout",
          "KEELSON_BODY_TIMEOUT": "client_body_timeout",
          "KEELSON_SEND_TIMEOUT": "send_timeout"}


def compose() -> dict[str, Any]:
    loaded: dict[str, Any] = yaml.safe_load((DOCKER / "compose.yaml").read_text())
    return loaded


def default_of(value: str) -> str:
    """``${NAME:-default}`` -> default."""
    match = re.fullmatch(r"\$\{\w+:-([^}]*)\}", value)
    assert match, value
    return match.group(1)


def rendered(environment: dict[str, str]) -> str:
    text = (DOCKER / "proxy.conf.template").read_text()
    return re.sub(r"\$\{(\w+)\}", lambda m: environment.get(m.group(1), m.group(0)), text)


def test_only_the_proxy_is_published_and_it_waits_for_a_healthy_api() -> None:
    services = compose()["services"]
    published = {name for name, service in services.items() if service.get("ports")}
    assert published == {"proxy"}
    assert services["proxy"]["depends_on"] == {"api": {"condition": "service_healthy"}}
    volume = services["proxy"]["volumes"][0]
    source, target = volume.split(":")[:2]
    assert (DOCKER / source).is_file()
    assert target == "/etc/nginx/templates/default.conf.template"  # the image renders it


def test_the_proxy_and_the_api_get_the_same_limits_with_the_api_defaults() -> None:
    services = compose()["services"]
    proxy, api = services["proxy"]["environment"], services["api"]["environment"]
    defaults = {name: setting(name).default for name in LIMITS}
    for name in LIMITS:
        assert proxy[name] == api[name] == services["worker"]["environment"][name]
        assert float(default_of(proxy[name])) == defaults[name]
    text = rendered({name: default_of(proxy[name]) for name in LIMITS})
    assert "${" not in text
    for name, directive in LIMITS.items():
        found = re.search(rf"^\s*{directive}\s+(\d+)s?;", text, re.MULTILINE)
        assert found and float(found.group(1)) == defaults[name], directive
    assert re.search(r"^\s*proxy_request_buffering on;", text, re.MULTILINE)


def test_the_proxy_reaches_the_api_where_the_image_listens() -> None:
    dockerfile = (DOCKER / "Dockerfile").read_text()
    assert "KEELSON_PORT=8000" in dockerfile and "EXPOSE 8000" in dockerfile
    assert "server api:8000;" in (DOCKER / "proxy.conf.template").read_text()
    assert compose()["services"]["api"]["expose"] == ["8000"]


def test_the_proxys_own_answers_are_problem_details_with_the_usual_headers() -> None:
    text = rendered({name: "1" for name in LIMITS})
    blocks = dict(re.findall(r"location = (/\.problem/\d{3}) \{(.*?)\n    \}", text,
                             re.DOTALL))
    assert len(blocks) == 5
    for uri, block in blocks.items():
        status, body = re.search(r"return (\d{3}) '(.*)';", block).groups()  # type: ignore[union-attr]
        problem = json.loads(body)
        assert uri.endswith(status) and problem["status"] == int(status)
        assert problem["title"] and problem["detail"]
        assert "internal;" in block and "default_type application/problem+json;" in block
        for name, value in SECURITY_HEADERS.items():
            quoted = f'"{value}"' if " " in value else value
            assert f"add_header {name} {quoted} always;" in block, (name, block)
        assert "add_header X-Request-Id $keelson_request_id always;" in block
    for code in ("400", "408", "413", "414", "502"):
        found = re.search(rf"error_page [\d ]*\b{code}\b[\d ]* (\S+);", text)
        assert found and found.group(1) in blocks, code
