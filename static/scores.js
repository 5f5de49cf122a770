// Score entry on the unit page (app/web/routes_scores.py): after a score is recorded or
// refused, the page comes back at the patient's row with the answer beside the form. Move the
// keyboard and screen-reader focus to that answer so it is read at once (the address's
// fragment names it, which browsers focus by themselves; this covers one that does not).
// After "load": scrolling to the fragment runs before it and would move the focus again.
(function () {
  "use strict";
  window.addEventListener("load", function () {
    var answer = document.querySelector(".row-result.refused, .row-result.recorded");
    if (!answer) { return; }
    if (document.activeElement !== answer) { answer.focus(); }
  });
})();
