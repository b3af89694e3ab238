/* The dataset search on a phone: the filters fold under their summary, so the results are
 * one scroll away instead of three. Loaded right after the filters (not deferred), so they
 * are folded before the first paint. Without JavaScript they simply stay open. */
(function () {
  "use strict";
  var box = document.getElementById("search-filters");
  if (!box || box.hasAttribute("data-keep-open") || !window.matchMedia) {
    return;
  }
  var narrow = window.matchMedia("(max-width: 47.99rem)");
  function fit() {
    box.open = !narrow.matches;
  }
  fit();
  if (narrow.addEventListener) {
    narrow.addEventListener("change", fit);
  }
})();
