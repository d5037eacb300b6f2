/* Stationfit review page: small conveniences only; every form works without this file. */
(function () {
  "use strict";

  // a decision that needs a value: typing the value chooses it, choosing it focuses the value
  function pair(form, inputClass, action) {
    var input = form.querySelector("input." + inputClass);
    var choice = form.querySelector("input[type=radio][value=" + action + "]");
    if (!input || !choice) { return null; }
    input.addEventListener("input", function () {
      if (input.value.trim() !== "") { choice.checked = true; }
    });
    choice.addEventListener("change", function () {
      if (choice.checked) { input.focus(); }
    });
    return choice;
  }

  function wire(form) {
    var choices = [pair(form, "sd-input", "sd"), pair(form, "value-input", "correct")];
    var reason = form.querySelector("input[name=reason]");
    var details = form.closest("details");
    if (details && reason) {
      details.addEventListener("toggle", function () {
        var typing = choices.some(function (c) { return c && c.checked; });
        if (details.open && !typing) { reason.focus(); }
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
