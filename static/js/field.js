// Test entry page helpers. Measured values are judged by the server only: typing in a
// value box asks it for its verdict through htmx (static/vendor/htmx.min.js), and without
// JavaScript the verdict shows after submit. Nothing here judges a value.
(function () {
  "use strict";
  // A choice the technician makes replaces the server's proposal note for that choice.
  document.addEventListener("change", function (e) {
    var group = e.target.closest && e.target.closest(".proposable");
    if (!group || e.target.type !== "radio") return;
    group.querySelectorAll(".proposal").forEach(function (note) { note.remove(); });
  });
  // So does editing a proposed failure description.
  document.addEventListener("input", function (e) {
    if (e.target.tagName !== "TEXTAREA" || !e.target.closest(".field-group")) return;
    e.target.closest(".field-group").querySelectorAll(".proposal").forEach(function (note) {
      note.remove();
    });
  });
  // The failure section opens when something failed: the technician's choice, or the
  // server's proposal swapped in by htmx. It never closes by itself.
  function openFailure(device) {
    var section = device && device.querySelector("details.failure-section");
    if (!section || section.open) return;
    if (device.querySelector("input[name$='-as_found'][value='fail']:checked, " +
        "input[name$='-as_left'][value='fail']:checked, " +
        "input[name$='-failure_mode']:checked:not([value=''])")) section.open = true;
  }
  function deviceOf(node) {
    return node && node.closest ? node.closest("fieldset.device") : null;
  }
  document.addEventListener("change", function (e) { openFailure(deviceOf(e.target)); });
  document.addEventListener("htmx:afterRequest", function (e) {
    openFailure(deviceOf(e.detail && e.detail.elt));
  });
  // Guard against a second tap on a slow connection: the server also refuses duplicates.
  var form = document.getElementById("entry-form");
  if (form) form.addEventListener("submit", function () {
    setTimeout(function () {
      form.querySelectorAll("button[type=submit]").forEach(function (b) { b.disabled = true; });
    }, 0);
  });
})();
