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
  // Guard against a second tap on a slow connection: the server also refuses duplicates.
  var form = document.getElementById("entry-form");
  if (form) form.addEventListener("submit", function () {
    setTimeout(function () {
      form.querySelectorAll("button[type=submit]").forEach(function (b) { b.disabled = true; });
    }, 0);
  });
})();
