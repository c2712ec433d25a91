"""What the browser tests share: where screenshots go, the two screen sizes, signing in
through the real form, and the check that a page does not scroll sideways."""

from pathlib import Path

from tests import factories as f

ARTIFACTS = Path(__file__).resolve().parents[2] / "test-artifacts"
PHONE = {"width": 390, "height": 844}
DESK = {"width": 1280, "height": 900}


def sign_in(page, base, username, next_url):
    """Sign in on the sign-in page, asking for ``next_url``, and wait until it is open."""
    page.goto(f"{base}/accounts/login/?next={next_url}")
    page.get_by_label("User name").fill(username)
    page.get_by_label("Password").fill(f.PASSWORD)
    page.get_by_role("button", name="Sign in").click()
    page.wait_for_url(f"**{next_url}*")


def no_sideways_scroll(page):
    width = page.evaluate("document.documentElement.scrollWidth")
    assert width <= page.viewport_size["width"], width
