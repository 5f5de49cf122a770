"""Figure JSON embedded in a page cannot close its script element (imported text could try)."""

from __future__ import annotations

import json

from app.web.templating import _script_json


def test_script_json_escapes_markup_and_stays_the_same_json() -> None:
    text = json.dumps({"rule": "specialty </script><script>alert(1)</script> & more"})
    safe = str(_script_json(text))
    assert "<" not in safe and ">" not in safe and "&" not in safe
    assert json.loads(safe) == json.loads(text)
