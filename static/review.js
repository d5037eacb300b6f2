/* Stationfit review page: small conveniences only; every form works without this file. */
(function () {
  "use strict";

  function wire(form) {
    var sd = form.querySelector("input.sd-input");
    var sdChoice = form.querySelector("input[type=radio][value=sd]");
    var reason = form.querySelector("input[name=reason]");
    if (!sd || !sdChoice) { return; }
    // typing a standard deviation means "change sd"
    sd.addEventListener("input", function () {
      if (sd.value.trim() !== "") { sdChoice.checked = true; }
    });
    // choosing "change sd" puts the cursor where the value goes
    sdChoice.addEventListener("change", function () {
      if (sdChoice.checked) { sd.focus(); }
    });
    var details = form.closest("details");
    if (details && reason) {
      details.addEventListener("toggle", function () {
        if (details.open && !sdChoice.checked) { reason.focus(); }
      });
    }
  }

  function start() {
    Array.prototype.forEach.call(document.querySelectorAll("form.decide-form"), wire);
  }

  if (document.readyState === "loading") {
    document.addEventListener("DOMContentLoaded", start);
  } else {
    start();
  }
})();
