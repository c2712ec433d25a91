// Live judging of measured values on the test entry page. The server judges again on
// save; without this script the page works the same, only without the instant hints.
(function () {
  "use strict";
  function num(text) {
    var t = String(text || "").trim().replace(/\s/g, "").replace(",", ".");
    if (t === "" || !/^[-+]?(\d+\.?\d*|\.\d+)([eE][-+]?\d+)?$/.test(t)) return null;
    return parseFloat(t);
  }
  function judge(input, value) {
    var d = input.dataset, ok = null;
    if (d.criterion === "around_setpoint" && d.target !== "" && d.tolerance !== "") {
      ok = Math.abs(value - parseFloat(d.target)) <= parseFloat(d.tolerance) + 1e-12;
    } else if (d.criterion === "at_most" && d.limit !== "") {
      ok = value <= parseFloat(d.limit);
    } else if (d.criterion === "at_least" && d.limit !== "") {
      ok = value >= parseFloat(d.limit);
    }
    if (d.maxTime) {
      var inTime = value <= parseFloat(d.maxTime);
      ok = ok === null ? inTime : ok && inTime;
    }
    return ok;
  }
  function radio(device, phase, verdict) {
    return device.querySelector('input[type=radio][name="' + device.dataset.prefix +
                                "-as_" + phase + '"][value="' + verdict + '"]');
  }
  function update(input) {
    var out = document.getElementById(input.id + "-judge");
    var device = input.closest("fieldset.device");
    var value = num(input.value);
    out.className = "judge";
    if (input.value.trim() === "") { out.textContent = ""; return; }
    if (value === null) { out.textContent = "Not a number"; out.classList.add("out"); return; }
    var ok = judge(input, value);
    if (ok === null) { out.textContent = ""; return; }
    out.textContent = ok ? "Within criterion" : "Outside criterion";
    out.classList.add(ok ? "in" : "out");
    if (!ok && device) {
      var fail = radio(device, input.dataset.phase, "fail");
      if (fail && !fail.checked) {
        fail.checked = true;
        var group = fail.closest(".verdict");
        var note = group && group.querySelector(".proposal");
        if (note) note.textContent = "Proposed: fail (value outside the criterion). Check before saving.";
      }
    }
  }
  document.addEventListener("input", function (e) {
    if (e.target.matches && e.target.matches("input.measured")) update(e.target);
  });
  document.addEventListener("change", function (e) {
    if (e.target.matches && e.target.matches(".verdict input[type=radio]")) {
      var note = e.target.closest(".verdict").querySelector(".proposal");
      if (note) note.textContent = "";
    }
  });
  document.querySelectorAll("input.measured").forEach(function (i) {
    if (i.value) {
      var out = document.getElementById(i.id + "-judge"), v = num(i.value);
      if (v !== null && out) {
        var ok = judge(i, v);
        if (ok !== null) { out.textContent = ok ? "Within criterion" : "Outside criterion"; out.className = "judge " + (ok ? "in" : "out"); }
      }
    }
  });
  // Guard against a second tap on a slow connection: the server also refuses duplicates.
  var form = document.getElementById("entry-form");
  if (form) form.addEventListener("submit", function () {
    setTimeout(function () {
      form.querySelectorAll("button[type=submit]").forEach(function (b) { b.disabled = true; });
    }, 0);
  });
})();
