// basinview PlotView: draws the figure held in the widget model with plotly.js.
//
// The model holds the figure as data: `traces` (with {bv_grid: i} placeholders),
// `grids` (large 2-D traces, re-sent only when they change), `plot_layout`, `config`.
// Numeric arrays arrive as {bv_array: dtype, shape, buffer: DataView}. Every view
// draws the current model state with Plotly.react, so a view opened later or a
// reloaded page needs no special code. plotly.js is asked from the kernel once per
// page (a message, never saved with the notebook) and kept on window.

const KEY = "__basinview_plotly__";
const ASK_AGAIN_MS = 15000;
const DOUBLE_CLICK_MS = 300;

function evaluate(source) {
  // plotly.min.js is a UMD bundle: give it a CommonJS `module` so it neither
  // registers with an AMD loader nor depends on what the page defines globally.
  const module = { exports: {} };
  const run = new Function("module", "exports", "define", source);
  run(module, module.exports, undefined);
  return module.exports;
}

function plotlyFor(model) {
  const shared = (window[KEY] = window[KEY] || { promise: null, asked: 0 });
  if (shared.promise && (shared.plotly || Date.now() - shared.asked < ASK_AGAIN_MS)) {
    return shared.promise;
  }
  shared.asked = Date.now();
  shared.promise = new Promise((resolve, reject) => {
    const onMessage = (msg, buffers) => {
      if (!msg || msg.kind !== "plotly.js" || !buffers || !buffers.length) return;
      model.off("msg:custom", onMessage);
      try {
        const view = buffers[0];
        const bytes =
          view instanceof ArrayBuffer
            ? new Uint8Array(view)
            : new Uint8Array(view.buffer, view.byteOffset, view.byteLength);
        shared.plotly = evaluate(new TextDecoder("utf-8").decode(bytes));
        shared.version = msg.version;
        resolve(shared.plotly);
      } catch (err) {
        shared.promise = null;
        reject(err);
      }
    };
    model.on("msg:custom", onMessage);
    model.send({ kind: "plotly.js?" });
  });
  return shared.promise;
}

const TYPED = {
  float64: Float64Array,
  float32: Float32Array,
  int32: Int32Array,
};

function toArray(enc) {
  const Type = TYPED[enc.bv_array] || Float64Array;
  const buf = enc.buffer;
  const flat =
    buf instanceof ArrayBuffer
      ? new Type(buf.slice(0))
      : new Type(buf.buffer.slice(buf.byteOffset, buf.byteOffset + buf.byteLength));
  const shape = enc.shape || [flat.length];
  if (shape.length <= 1) return flat;
  // 2-D data (a contour's z): rows of plain numbers, gaps as null
  const [rows, cols] = shape;
  const out = new Array(rows);
  for (let i = 0; i < rows; i++) {
    const row = new Array(cols);
    for (let j = 0; j < cols; j++) {
      const v = flat[i * cols + j];
      row[j] = Number.isFinite(v) ? v : null;
    }
    out[i] = row;
  }
  return out;
}

function decode(value) {
  if (Array.isArray(value)) return value.map(decode);
  if (value && typeof value === "object") {
    if (value.bv_array !== undefined && value.buffer !== undefined) return toArray(value);
    const out = {};
    for (const k of Object.keys(value)) out[k] = decode(value[k]);
    return out;
  }
  return value;
}

function render({ model, el }) {
  const root = document.createElement("div");
  root.className = "bv-plot";
  const plot = document.createElement("div");
  plot.className = "bv-plot-area";
  root.appendChild(plot);
  el.appendChild(root);
  let Plotly = null;
  let gridsSource = null;
  let grids = [];
  let pending = false;
  let alive = true;
  let observer = null;
  let shownRevision = null;

  const figure = () => {
    const source = model.get("grids");
    if (source !== gridsSource) {
      grids = decode(source || []);
      gridsSource = source;
    }
    const data = (model.get("traces") || []).map((t) =>
      t && t.bv_grid !== undefined ? grids[t.bv_grid] : decode(t)
    );
    const layout = decode(model.get("plot_layout") || {});
    layout.height = model.get("height");
    return { data, layout };
  };

  const draw = () => {
    pending = false;
    if (!alive || !Plotly) return;
    const { data, layout } = figure();
    const config = Object.assign({}, model.get("config") || {});
    plot.style.height = layout.height + "px";
    // Same view (uirevision): Plotly.react updates in place, keeping zoom and camera
    // and never showing an empty frame. Another slice or span: a fresh plot, so no
    // axis state of the old slice is carried over.
    const fresh = layout.uirevision !== shownRevision;
    shownRevision = layout.uirevision;
    const drawn = fresh
      ? Plotly.newPlot(plot, data, layout, config).then(() => listen())
      : Plotly.react(plot, data, layout, config);
    drawn.then(() => {
      root.dataset.revision = String(model.get("revision"));
    });
  };
  // Traits that change together arrive as one message; draw once per frame anyway.
  const schedule = () => {
    if (pending) return;
    pending = true;
    requestAnimationFrame(draw);
  };

  const listen = () => {
    // newPlot purges the div's listeners; never register ours twice either way
    if (plot.removeAllListeners) {
      for (const name of ["plotly_click", "plotly_doubleclick", "plotly_relayout"]) {
        plot.removeAllListeners(name);
      }
    }
    // A click is sent a moment later, and not at all when it was half of a double
    // click (which resets the zoom and must not add two starts).
    let clickTimer = null;
    let lastDouble = -Infinity;
    plot.on("plotly_click", (event) => {
      const p = event && event.points && event.points[0];
      if (!p) return;
      const x = typeof p.x === "number" ? p.x : Number(p.x);
      const y = typeof p.y === "number" ? p.y : Number(p.y);
      if (!Number.isFinite(x) || !Number.isFinite(y)) return;
      const uid = (p.data && p.data.uid) || "";
      const at = performance.now();
      if (at - lastDouble < DOUBLE_CLICK_MS) return; // the second half of a double click
      if (clickTimer) clearTimeout(clickTimer);
      clickTimer = setTimeout(() => {
        clickTimer = null;
        if (lastDouble >= at) return; // a double click came after it
        model.send({ kind: "click", x, y, uid });
      }, DOUBLE_CLICK_MS);
    });
    plot.on("plotly_doubleclick", () => {
      lastDouble = performance.now();
      if (clickTimer) clearTimeout(clickTimer);
      clickTimer = null;
    });
    plot.on("plotly_relayout", (data) => {
      const kept = {};
      for (const k of Object.keys(data || {})) {
        if (/^(x|y)axis\d*\.(range|autorange)/.test(k) || /^scene\d*\.camera/.test(k)) {
          kept[k] = data[k];
        }
      }
      if (Object.keys(kept).length) model.send({ kind: "relayout", data: kept });
    });
  };

  model.on("change:traces", schedule);
  model.on("change:grids", schedule);
  model.on("change:plot_layout", schedule);
  model.on("change:height", schedule);

  plotlyFor(model)
    .then((lib) => {
      if (!alive) return;
      Plotly = lib;
      const { data, layout } = figure();
      plot.style.height = layout.height + "px";
      shownRevision = layout.uirevision;
      return Plotly.newPlot(plot, data, layout, model.get("config") || {}).then(() => {
        // A view drawn later (a reloaded page, a second display) takes the user's zoom
        // and camera from the model, as a zoom (a double click still resets the view).
        const ranges = model.get("view_ranges") || {};
        const zoomed = Object.keys(ranges).length
          ? Plotly.relayout(plot, Object.assign({}, ranges))
          : Promise.resolve();
        return zoomed.then(() => {
          root.dataset.revision = String(model.get("revision"));
          listen();
          // Follow the container (side panel opened, window resized): plotly.js's own
          // `responsive` option only follows the window.
          observer = new ResizeObserver(() => {
            if (alive && Plotly && plot.offsetWidth > 0) Plotly.Plots.resize(plot);
          });
          observer.observe(root);
        });
      });
    })
    .catch((err) => {
      root.textContent = "basinview: plotly.js could not be loaded (" + err + ")";
      console.warn("basinview: plotly.js could not be loaded", err);
    });

  return () => {
    alive = false;
    if (observer) observer.disconnect();
    model.off("change:traces", schedule);
    model.off("change:grids", schedule);
    model.off("change:plot_layout", schedule);
    model.off("change:height", schedule);
    if (Plotly) Plotly.purge(plot);
  };
}

export default { render };
