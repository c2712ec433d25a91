// A button or link with data-confirm="question" asks the question first; cancelling stops
// the click. Without JavaScript the action goes ahead unasked.
(function () {
  "use strict";
  document.addEventListener("click", function (e) {
    var el = e.target.closest && e.target.closest("[data-confirm]");
    if (el && !window.confirm(el.dataset.confirm)) e.preventDefault();
  });
})();
