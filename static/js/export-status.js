// Background export page: while the file is written, show how many SIFs are done; once it
// has finished, reload to offer the download. Without JavaScript the page refreshes itself.
(function () {
  "use strict";
  var status = document.getElementById("export-status");
  if (!status) return;
  function show(d) {
    var bar = document.getElementById("export-progress");
    bar.max = d.sifs_total;
    bar.value = d.sifs_done;
    document.getElementById("export-sifs").textContent = d.sifs_done + " of " + d.sifs_total + " SIFs";
    return d.finished;
  }
  function ask() {
    fetch(status.dataset.statusUrl, {credentials: "same-origin"})
      .then(function (r) { return r.json(); })
      .then(function (d) { if (show(d)) { window.location.reload(); } else { setTimeout(ask, 2000); } })
      .catch(function () { setTimeout(ask, 5000); });
  }
  setTimeout(ask, 1500);
})();
