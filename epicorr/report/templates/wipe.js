(function () {
  "use strict";
  function setup(root) {
    var stages = Array.prototype.slice.call(root.querySelectorAll(".wipe-stage"));
    var range = root.querySelector("input[type=range]");
    var readout = root.querySelector(".wipe-readout");
    function show(pct) {
      pct = Math.max(0, Math.min(100, Number(pct)));
      stages.forEach(function (st) {
        st.querySelector(".wipe-after").style.clipPath = "inset(0 0 0 " + pct + "%)";
        st.querySelector(".wipe-line").style.left = pct + "%";
      });
      if (String(range.value) !== String(pct)) { range.value = pct; }
      root.dataset.position = String(pct);
      readout.textContent = pct >= 100 ? "showing: before only" :
        pct <= 0 ? "showing: after only" :
        "before | after at " + Math.round(pct) + "%";
    }
    range.addEventListener("input", function () { show(range.value); });
    stages.forEach(function (stage) {
      var dragging = false;
      function fromPointer(ev) {
        var box = stage.getBoundingClientRect();
        if (box.width > 0) { show(Math.round(100 * (ev.clientX - box.left) / box.width)); }
      }
      stage.addEventListener("pointerdown", function (ev) {
        dragging = true;
        if (stage.setPointerCapture) { stage.setPointerCapture(ev.pointerId); }
        fromPointer(ev);
      });
      stage.addEventListener("pointermove", function (ev) { if (dragging) { fromPointer(ev); } });
      stage.addEventListener("pointerup", function () { dragging = false; });
      stage.addEventListener("pointercancel", function () { dragging = false; });
    });
    root.querySelectorAll("button[data-go]").forEach(function (b) {
      b.addEventListener("click", function () { show(b.getAttribute("data-go")); });
    });
    show(range.value);
  }
  document.querySelectorAll("[data-wipe]").forEach(setup);
})();
