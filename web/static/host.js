// Stand-in survey page: shows the completion message posted by the embedded respondent page.
(function () {
  "use strict";
  var frame = document.getElementById("survey-frame");
  var out = document.getElementById("completion");
  window.addEventListener("message", function (ev) {
    if (ev.origin !== frame.dataset.origin) return;
    var d = ev.data || {};
    if (d.type !== "trialogue:complete") return;
    out.textContent = "Completed: respondent " + d.rid + ", completion code " + d.code + ", arm code " + d.arm_code + ".";
    out.dataset.code = d.code;
  });
})();
