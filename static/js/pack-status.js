// Evidence pack page: while the pack builds, ask the server for its progress and show it;
// reload once it has finished. Without JavaScript the page refreshes itself (<noscript>).
(function () {
  "use strict";
  var el = document.getElementById("pack-status");
  if (!el) return;
  var url = el.dataset.statusUrl;
  function poll() {
    fetch(url, {credentials: "same-origin"}).then(function (r) { return r.json(); }).then(function (d) {
      document.getElementById("pack-progress").value = d.progress;
      document.getElementById("pack-stage").textContent = d.progress + " % " + d.stage;
      if (d.finished) { window.location.reload(); } else { setTimeout(poll, 2000); }
    }).catch(function () { setTimeout(poll, 5000); });
  }
  setTimeout(poll, 1500);
})();
