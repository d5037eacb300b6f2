// The relative-precision picker on the results page: "Add pair" collects several
// From/To pairs before the form is sent.  Without this script the form still sends
// the one pair in the selects and the "all pairs among" choice.
(function () {
  "use strict";
  var MAX_PAIRS = 200;

  function setUp(form) {
    var add = form.querySelector("[data-relative-add]");
    var list = form.querySelector("[data-relative-list]");
    var from = form.querySelector("select[name=from]");
    var to = form.querySelector("select[name=to]");
    if (!add || !list || !from || !to) return;
    add.hidden = false;
    [from, to].forEach(function (select) {
      select.addEventListener("change", function () { to.setCustomValidity(""); });
    });

    function chosen() {
      return Array.prototype.map.call(list.querySelectorAll("input[name=pair]"), function (input) {
        return input.value;
      });
    }

    add.addEventListener("click", function () {
      var a = from.value, b = to.value;
      if (!a || !b || a === b) {
        to.setCustomValidity(a && a === b ? "Choose two different points." : "Choose both points.");
        to.reportValidity();
        return;
      }
      to.setCustomValidity("");
      var pairs = chosen();
      if (pairs.indexOf(a + " " + b) >= 0 || pairs.indexOf(b + " " + a) >= 0) return;
      if (pairs.length >= MAX_PAIRS) return;
      var item = document.createElement("li");
      var label = document.createElement("span");
      label.textContent = a + "–" + b;  // point names are text, never markup
      var hidden = document.createElement("input");
      hidden.type = "hidden";
      hidden.name = "pair";
      hidden.value = a + " " + b;
      var remove = document.createElement("button");
      remove.type = "button";
      remove.className = "link-button";
      remove.textContent = "Remove";
      remove.setAttribute("aria-label", "Remove the pair " + a + "–" + b);
      remove.addEventListener("click", function () { item.remove(); });
      item.appendChild(label);
      item.appendChild(document.createTextNode(" "));
      item.appendChild(remove);
      item.appendChild(hidden);
      list.appendChild(item);
      from.value = "";
      to.value = "";
    });
  }

  document.addEventListener("DOMContentLoaded", function () {
    Array.prototype.forEach.call(document.querySelectorAll("form[data-relative-picker]"), setUp);
  });
})();
