// The design page: switching a planned observation on or off re-evaluates the figures at once
// (GET design.json?off=…) and puts the formatted text in place.  Without this script the
// form's Re-evaluate button does the same through a page load.
(function () {
  "use strict";
  var form = document.getElementById("design-form");
  if (!form) { return; }
  var url = form.getAttribute("data-json");
  var status = document.getElementById("design-status");
  var errorBox = document.getElementById("design-error");
  var pending = 0;

  function offLines() {
    var off = [];
    form.querySelectorAll("input[name=on]").forEach(function (box) {
      if (!box.checked) { off.push(box.value); }
    });
    return off.join(",");
  }

  function setText(cell, text) { if (cell && cell.textContent !== text) { cell.textContent = text; } }

  function fillRows(tbody, rows) {
    while (tbody.firstChild) { tbody.removeChild(tbody.firstChild); }
    rows.forEach(function (cells) {
      var tr = document.createElement("tr");
      cells.forEach(function (text, k) {
        var td = document.createElement(k === 0 ? "th" : "td");
        if (k === 0) { td.setAttribute("scope", "row"); } else { td.className = "num"; }
        td.textContent = text;
        tr.appendChild(td);
      });
      tbody.appendChild(tr);
    });
  }

  function show(figures) {
    errorBox.hidden = true;
    fillRows(document.querySelector("#design-summary tbody"), figures.summary);
    document.querySelectorAll("#design-points tbody tr").forEach(function (tr) {
      var values = figures.points[tr.getAttribute("data-point")];
      if (!values) { return; }
      var cells = tr.querySelectorAll("td");
      values.forEach(function (text, k) { setText(cells[k], text); });
    });
    form.querySelectorAll("tbody tr[data-line]").forEach(function (tr) {
      var o = figures.observations[tr.getAttribute("data-line")];
      if (!o) { return; }
      ["sd", "redundancy", "mdb", "external", "note"].forEach(function (key) {
        setText(tr.querySelector("[data-figure=" + key + "]"), o[key]);
      });
      tr.classList.toggle("is-flagged", /^(weak|uncontrolled)/.test(o.note));
    });
    // pairs come and go with the observations that join them: the body is rebuilt
    var relative = document.querySelector("#design-relative tbody");
    if (relative) {
      while (relative.firstChild) { relative.removeChild(relative.firstChild); }
      figures.relative.forEach(function (cells) {
        var tr = document.createElement("tr");
        cells.forEach(function (text, k) {
          var td = document.createElement("td");
          if (k >= 2 && k <= 4) { td.className = "num"; }
          td.textContent = text;
          tr.appendChild(td);
        });
        relative.appendChild(tr);
      });
    }
    var list = document.getElementById("design-warnings");
    while (list.firstChild) { list.removeChild(list.firstChild); }
    (figures.warnings.length ? figures.warnings : ["None."]).forEach(function (w) {
      var li = document.createElement("li");
      li.textContent = w;
      list.appendChild(li);
    });
  }

  function refuse(body) {
    errorBox.hidden = false;
    errorBox.textContent = (body && body.error) || "The design cannot be evaluated.";
  }

  function evaluate() {
    var off = offLines();
    var ticket = ++pending;
    status.textContent = "Re-evaluating…";
    ["design-pdf", "design-html"].forEach(function (id) {
      var link = document.getElementById(id);
      if (link) { link.href = link.href.replace(/\?off=.*$/, "?off=" + off); }
    });
    fetch(url + "?off=" + encodeURIComponent(off), { headers: { "Accept": "application/json" } })
      .then(function (response) {
        return response.json().then(function (body) { return { ok: response.ok, body: body }; });
      })
      .then(function (answer) {
        if (ticket !== pending) { return; }  // a later change is on its way
        if (answer.ok) { show(answer.body); status.textContent = "Up to date."; }
        else { refuse(answer.body); status.textContent = ""; }
      })
      .catch(function () { if (ticket === pending) { status.textContent = "Could not re-evaluate."; } });
  }

  form.addEventListener("change", function (event) {
    if (event.target && event.target.name === "on") { evaluate(); }
  });
  var apply = document.getElementById("design-apply");
  if (apply) { apply.hidden = true; }
  form.setAttribute("data-ready", "1");
})();
