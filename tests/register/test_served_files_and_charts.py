"""An attachment whose stored file changed is refused; SIF charts are drawn once per inputs."""

import hashlib
import logging

import pytest
from django.core.cache import cache
from django.core.files.uploadedfile import SimpleUploadedFile
from django.urls import reverse
from django.utils import timezone

from register import charts
from register.audit import chain as audit
from register.models import Attachment, SafetyFunction
from tests.register.test_field_views import entry_data, login, plant, start_url  # noqa: F401

pytestmark = pytest.mark.django_db

PNG = b"\x89PNG\r\n\x1a\n" + b"0" * 64


def _attach(client, p):
    login(client, p["tech"])
    client.post(start_url(p), {**entry_data(p),
                               "attachments": SimpleUploadedFile("gauge.png", PNG,
                                                                 content_type="image/png")})
    return Attachment.objects.get()


def test_intact_attachment_is_served(client, plant, settings, tmp_path):  # noqa: F811
    settings.MEDIA_ROOT = tmp_path
    att = _attach(client, plant)
    assert att.sha256 == hashlib.sha256(PNG).hexdigest()  # recorded at upload
    got = client.get(reverse("field:attachment", args=[att.pk]))
    assert got.status_code == 200 and b"".join(got.streaming_content) == PNG


def test_overwritten_attachment_is_refused_and_logged(client, plant, settings, tmp_path,  # noqa: F811
                                                      caplog):
    settings.MEDIA_ROOT = tmp_path
    att = _attach(client, plant)
    with open(att.file.path, "wb") as fh:  # same size, other bytes
        fh.write(b"\x89PNG\r\n\x1a\n" + b"1" * 64)
    with caplog.at_level(logging.ERROR, logger="register.audit.chain"):
        got = client.get(reverse("field:attachment", args=[att.pk]))
    assert got.status_code == 410
    body = got.content.decode()
    assert "is not served" in body and att.sha256 in body
    assert hashlib.sha256(b"\x89PNG\r\n\x1a\n" + b"1" * 64).hexdigest() in body
    assert any("changed after it was attached" in r.message for r in caplog.records)
    assert "changed after it was attached" in audit.attachment_altered(att)


def test_sif_chart_is_drawn_once_per_inputs_digest(client, plant, monkeypatch):  # noqa: F811
    from calcs import adapter

    cache.clear()
    sif = plant["sif"]
    adapter.recompute_many(SafetyFunction.objects.filter(pk=sif.pk), trigger="test")
    drawn = []
    real = charts.pfd_chart
    monkeypatch.setattr(charts, "pfd_chart", lambda *a, **k: drawn.append(1) or real(*a, **k))
    login(client, plant["auditor"])
    url = reverse("register:sif_chart", args=[sif.pk, "pfd"])
    first = client.get(url)
    second = client.get(url)
    assert first.status_code == second.status_code == 200
    assert first.content == second.content and b"<svg" in first.content
    assert len(drawn) == 1
    # Other inputs (another digest) are another key: drawn again.
    latest = adapter.latest_assessments([sif.pk])[sif.pk]
    key = charts.chart_cache_key("pfd", latest.inputs_digest, charts.CHART_SIZE, sif.tag,
                                 timezone.now().date())
    assert cache.get(key) == first.content
    cache.delete(key)
    client.get(url)
    assert len(drawn) == 2


def test_chart_without_digest_is_not_cached():
    calls = []
    assert charts.cached_chart("pfd", None, lambda: calls.append(1) or b"x") == b"x"
    assert charts.cached_chart("pfd", "", lambda: calls.append(1) or b"x") == b"x"
    assert len(calls) == 2
