// Background import page: while the rows are written, ask the server how many and show it;
// reload once the import has finished. Without JavaScript the page refreshes itself (<noscript>).
(function () {
  "use strict";
  var el = document.getElementById("import-status");
  if (!el) return;
  var url = el.dataset.statusUrl;
  function poll() {
    fetch(url, {credentials: "same-origin"}).then(function (r) { return r.json(); }).then(function (d) {
      var bar = document.getElementById("import-progress");
      bar.max = d.rows_total;
      bar.value = d.rows_done;
      document.getElementById("import-rows").textContent = d.rows_done + " of " + d.rows_total + " rows";
      if (d.finished) { window.location.reload(); } else { setTimeout(poll, 2000); }
    }).catch(function () { setTimeout(poll, 5000); });
  }
  setTimeout(poll, 1500);
})();
