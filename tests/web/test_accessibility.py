"""Every page checked by axe-core (Deque's accessibility engine, bundled by
axe-playwright-python, no download) in Debian's Chromium, as a bed manager and as a nurse.

The standard is axe-core's own rule set (WCAG 2.x A and AA rules plus its best practices);
axe-core grades each violation minor, moderate, serious or critical (axe-core's
documentation, "impact"). Target (the pages issue): no serious or critical violation on any
page. Every finding, whatever its impact, is written to
test-artifacts/accessibility-<role>.txt so the minor and moderate ones can be read too.
"""

from __future__ import annotations

from collections.abc import Iterator

import pytest

from app.config import PROJECT_ROOT
from tests.web.served import Served
from tests.web.site_pages import SitePage, signed_in_context, site_pages, visit

pytestmark = [pytest.mark.browser, pytest.mark.slow]

ROLES = {"manager": "bed manager", "nurse": "nurse in charge"}
BLOCKING = ("serious", "critical")
REPORTS = PROJECT_ROOT / "test-artifacts"
_found: dict[str, list[str]] = {role: [] for role in ROLES}


@pytest.fixture(scope="module")
def contexts(chromium: object, site: Served) -> Iterator[dict[str, object]]:
    opened = {role: signed_in_context(chromium, site, role,
                                      viewport={"width": 1600, "height": 1000})
              for role in ROLES}
    yield opened
    for context in opened.values():
        context.close()  # type: ignore[attr-defined]
    REPORTS.mkdir(exist_ok=True)
    for role, lines in _found.items():
        (REPORTS / f"accessibility-{role}.txt").write_text(
            "\n".join(lines) + "\n" if lines else "no violations\n", encoding="utf-8")


def _describe(page_name: str, violation: dict) -> str:
    targets = "; ".join(" ".join(map(str, node.get("target", [])))
                        for node in violation["nodes"][:4])
    return (f"{page_name}: {violation['id']} ({violation['impact']}) x{len(violation['nodes'])}"
            f" - {violation['help']} [{targets}]")


@pytest.mark.parametrize("role", list(ROLES))
@pytest.mark.parametrize("site_page", site_pages(), ids=lambda p: p.name)
def test_no_serious_or_critical_violation(contexts: dict[str, object], site: Served,
                                          role: str, site_page: SitePage) -> None:
    from axe_playwright_python.sync_playwright import Axe

    page = contexts[role].new_page()  # type: ignore[attr-defined]
    try:
        status = visit(page, site, site_page)
        assert status in (200, 403, 404), status
        results = Axe().run(page)
    finally:
        page.close()
    violations = results.response["violations"]
    _found[role] += [_describe(site_page.name, v) for v in violations]
    blocking = [_describe(site_page.name, v) for v in violations if v["impact"] in BLOCKING]
    # Did axe run at all? It reports the rules it passed and failed; none means no check.
    assert results.response.get("testEngine", {}).get("name") == "axe-core"
    assert not blocking, "\n".join(blocking)
