// Loaded by every page (templates/base.html): the Print button, the busy indicator of forms
// that start long work, and chart containers that hold controls. No inline script: the
// Content-Security-Policy forbids it.
(function () {
  "use strict";

  // A chart's container is announced as a figure, not an image: the drawn chart holds
  // focusable controls, and an image may not contain any (axe-core "nested-interactive").
  function chartsAsFigures() {
    document.querySelectorAll('div[role="img"]').forEach(function (chart) {
      chart.setAttribute("role", "figure");
    });
  }

  function printButtons() {
    document.querySelectorAll("[data-print]").forEach(function (button) {
      button.addEventListener("click", function () { window.print(); });
    });
  }

  // <form data-busy="Simulating ..."> : while the answer is computed the submit button is
  // disabled, a spinner with the text is shown (announced politely), and, for a form that
  // only reads (GET), a Cancel button stops waiting for the answer.
  function busyForms() {
    document.querySelectorAll("form[data-busy]").forEach(function (form) {
      form.addEventListener("submit", function () {
        var buttons = form.querySelectorAll('button[type="submit"], button:not([type])');
        window.setTimeout(function () {  // after the browser has read the form
          buttons.forEach(function (b) { b.disabled = true; b.setAttribute("aria-disabled", "true"); });
        }, 0);
        var note = document.createElement("span");
        note.className = "busy-note";
        note.setAttribute("role", "status");
        note.textContent = form.getAttribute("data-busy");
        var anchor = buttons.length ? buttons[buttons.length - 1] : form.lastChild;
        anchor.parentNode.insertBefore(note, anchor.nextSibling);
        if ((form.getAttribute("method") || "get").toLowerCase() === "get") {
          var cancel = document.createElement("button");
          cancel.type = "button";
          cancel.className = "secondary";
          cancel.textContent = "Cancel";
          cancel.addEventListener("click", function () {
            window.stop();
            note.remove();
            cancel.remove();
            buttons.forEach(function (b) { b.disabled = false; b.removeAttribute("aria-disabled"); });
          });
          note.parentNode.insertBefore(cancel, note.nextSibling);
        }
      });
    });
  }

  // <a data-busy="..."> to a page that takes long to compute: the same note while it loads.
  function busyLinks() {
    document.querySelectorAll("a[data-busy]").forEach(function (link) {
      link.addEventListener("click", function (event) {
        if (event.ctrlKey || event.metaKey || event.shiftKey || link.getAttribute("aria-busy")) { return; }
        link.setAttribute("aria-busy", "true");
        var note = document.createElement("span");
        note.className = "busy-note";
        note.setAttribute("role", "status");
        note.textContent = link.getAttribute("data-busy");
        link.parentNode.insertBefore(note, link.nextSibling);
      });
    });
  }

  document.addEventListener("DOMContentLoaded", function () {
    chartsAsFigures();
    printButtons();
    busyForms();
    busyLinks();
  });
})();
