// upwell console: the little that needs a script. Pages work without it.
(function () {
  "use strict";

  // The overview refreshes itself while the service runs: the page is fetched again and its
  // #live part replaced, so focus and scroll position stay where they are.
  var every = Number(document.body.getAttribute("data-refresh") || 0);
  if (every > 0) {
    window.setInterval(function () {
      if (document.hidden) { return; }
      fetch(window.location.href, { credentials: "same-origin", headers: { Accept: "text/html" } })
        .then(function (answer) { return answer.ok ? answer.text() : null; })
        .then(function (html) {
          if (!html) { return; }
          var fresh = new DOMParser().parseFromString(html, "text/html").getElementById("live");
          var live = document.getElementById("live");
          if (fresh && live) {
            live.replaceWith(fresh);
            var stamp = document.getElementById("refreshed");
            if (stamp) { stamp.textContent = "; last at " + new Date().toLocaleTimeString(); }
          }
        })
        .catch(function () { /* the next tick tries again */ });
    }, every * 1000);
  }

  // History chart: Enter or a click on a point opens that commit's changes.
  var chart = document.querySelector(".history-chart");
  if (chart) {
    chart.addEventListener("click", function (event) {
      var target = event.target.closest("[data-commit]");
      if (target) {
        window.location.href = "/console/history?to=" +
          encodeURIComponent(target.getAttribute("data-commit")) + "#diff";
      }
    });
  }
})();
