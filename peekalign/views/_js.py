"""Browser-side callbacks of the standalone document (plain JavaScript strings).

Every callback gets the same ``args`` (see ``_document._js_args``) and starts with
:data:`LIB`. The window formula is the one of :func:`peekalign.views._model.window_state`
(and of :mod:`peekalign.streaming`):

    start = look_back < 0 ? 0 : max(0, n_u - look_back)
    end   = min(T - 1, n_u + eps)
    hf    = n_u + eps + enc                (enc = encoder look-ahead frames, L * r;
                                            not clamped: past the end all is audible)
            or, with a per-frame encoder right context, heard[min(m, T - 1)] +
            max(0, m - (T - 1)) for m = n_u + eps (heard[m] = max_{j <= m} j + rc[j])
    heard_until_s = offset + hf * shift + right_context
    right context (ms) = (heard_until_s - time(n_u)) * 1000
    margin(w) = heard_until_s(last token of w) - end_s(w)
"""

from __future__ import annotations

LIB = r"""
const esc = (s) => String(s).replace(/[&<>"']/g, (c) => ({"&": "&amp;", "<": "&lt;", ">": "&gt;", '"': "&quot;", "'": "&#39;"}[c]));
const ftime = (f) => C.offset + f * C.shift;
const heard_frame = (m) => (C.heard === undefined ? m + C.enc : C.heard[Math.min(m, C.T - 1)] + Math.max(0, m - (C.T - 1)));
function win_state(u, eps) { return win_state_n(tok.data.trigger[u], eps); }
function win_state_n(n, eps) {
  const start = C.look_back < 0 ? 0 : Math.max(0, n - C.look_back);
  const end = Math.min(C.T - 1, n + eps);
  const hf = heard_frame(n + eps);
  return {n, start, end, hf,
          x0: ftime(start) - C.shift / 2, x1: ftime(end) + C.shift / 2,
          hs: ftime(hf) + C.rc, trig: ftime(n)};
}
function decode(store, i, R, Cn) {
  const rows = store.rows.data, vals = store.values.data.v, sc = store.scale.data.scale[i] / 255;
  const out = new Float32Array(R * Cn);
  for (let r = 0; r < R; r++) {
    const k = i * R + r, lo = rows.lo[k], n = rows.len[k], o = rows.off[k];
    for (let j = 0; j < n; j++) out[r * Cn + lo + j] = vals[o + j] * sc;
  }
  return out;
}
function set_image(src, flat, R, Cn) {
  const {ndarray} = Bokeh.require("core/util/ndarray");
  const d = Object.assign({}, src.data);
  d.image = [ndarray(flat, {dtype: "float32", shape: [R, Cn]})];
  src.data = d;
}
function att_rows_of(u) {
  const out = [];
  for (let r = 0; r < C.att_row_token.length; r++) if (C.att_row_token[r] == u) out.push(r);
  return out;
}
function cut_mass(u, st) {
  // share of the current attention image's rows (those of token u) outside the window
  if (att_img == null || C.att_R == 0) return null;
  const rows = att_rows_of(u);
  if (rows.length == 0) return null;
  let tot = 0, out = 0;
  for (const r of rows) {
    for (let t = 0; t < C.T; t++) {
      const v = att_img[r * C.T + t];
      tot += v;
      if (t < st.start || t > st.end) out += v;
    }
  }
  return tot > 0 ? out / tot : null;
}
function info_html(u, eps, st) {
  if (u < 0 || u >= C.U) return "<i>no token selected</i>";
  const w = tok.data.word[u];
  const ms = (x) => (x * 1000).toFixed(0);
  let s = "<b>token #" + u + "</b> &lsquo;" + esc(tok.data.label[u]) + "&rsquo;";
  if (w >= 0) s += " in &lsquo;" + esc(ref.data.word[w]) + "&rsquo;";
  s += " &middot; trigger frame " + st.n + " (" + st.trig.toFixed(3) + " s, " + esc(tok.data.trigger_src[u]) + ")";
  s += " &middot; decoder window frames " + st.start + "&ndash;" + st.end;
  s += " (" + st.x0.toFixed(3) + "&ndash;" + st.x1.toFixed(3) + " s, look-ahead " + eps + " = " + ms(eps * C.shift) + " ms)";
  s += " &middot; right context " + ms(st.hs - st.trig) + " ms (hears until " + st.hs.toFixed(3) + " s)";
  if (w >= 0 && u == ref.data.last_token[w]) {
    const m = st.hs - ref.data.right[w];
    s += " &middot; word ends " + ref.data.right[w].toFixed(3) + " s: reach margin " + (m >= 0 ? "+" : "&minus;") + ms(Math.abs(m)) + " ms (" + (m >= 0 ? "reached" : "cut off") + ")";
  } else if (w >= 0) {
    s += " &middot; (margin is measured at the word's last token)";
  }
  const cm = cut_mass(u, st);
  if (cm != null) s += " &middot; attention mass outside the window (" + esc(att_mode_label()) + ") " + cm.toFixed(3);
  return s;
}
function update(u, eps) {
  const st = (u >= 0 && u < C.U) ? win_state(u, eps) : null;
  for (const b of bands) {
    // [window strip, right-context strip, window-end line, trigger line]
    if (st == null) { for (const m of b) m.visible = false; continue; }
    b[0].left = st.x0; b[0].right = st.x1; b[0].visible = true;
    b[1].left = st.x1; b[1].right = Math.max(st.hs, st.x1); b[1].visible = st.hs > st.x1;
    b[2].location = st.x1; b[2].visible = true;
    b[3].location = st.trig; b[3].visible = true;
  }
  if (st != null && (tok.selected.indices.length != 1 || tok.selected.indices[0] != u)) tok.selected.indices = [u];
  // selected token's curve: its slice of the reference curves
  if (curves != null) {
    const cd = curves.data, xs = [], ps = [], ys = [];
    for (let i = 0; i < cd.u.length; i++) if (cd.u[i] == u) { xs.push(cd.x[i]); ps.push(cd.p[i]); ys.push(cd.y[i]); }
    sel.data = {x: xs, p: ps, y: ys};
  }
  for (const rb of row_bands) {
    const rows = rb[1] ? att_rows_of(u) : [u];
    if (st == null || rows.length == 0) { rb[0].visible = false; continue; }
    rb[0].bottom = Math.min(...rows) - 0.5; rb[0].top = Math.max(...rows) + 0.5; rb[0].visible = true;
    const yr = rb[2], R = rb[3];
    if (R > C.follow_rows) {
      const mid = (Math.min(...rows) + Math.max(...rows)) / 2, half = C.follow_rows / 2;
      const lo = Math.max(-0.5, Math.min(R - 0.5 - C.follow_rows, mid - half));
      yr.start = lo + C.follow_rows; yr.end = lo;
    }
  }
  if (edge != null) {
    const ex = [], ey = [], hx = [], hy = [];
    for (let r = 0; r < C.att_trigger.length; r++) {
      if (C.att_trigger[r] < 0) continue;
      const s2 = win_state_n(C.att_trigger[r], eps);
      ex.push(s2.x1, s2.x1); hx.push(s2.hs, s2.hs); ey.push(r - 0.5, r + 0.5); hy.push(r - 0.5, r + 0.5);
    }
    edge.data = {x: ex, y: ey}; hedge.data = {x: hx, y: hy};
  }
  if (info != null) info.text = info_html(u, eps, st);
  if (slider != null) slider.title = "decoder look-ahead (frames; " + ms_of(eps) + " ms)";
}
function att_mode_label() {
  if (mode_select == null) return C.att_mode_labels.length ? C.att_mode_labels[C.att_mode_index] : "";
  const i = C.att_modes.indexOf(mode_select.value);
  return i < 0 ? "" : C.att_mode_labels[i];
}
const ms_of = (eps) => (eps * C.shift * 1000).toFixed(0);
const cur_u = () => (select != null ? parseInt(select.value) : (tok.selected.indices.length ? tok.selected.indices[0] : -1));
const cur_eps = () => (slider != null ? slider.value : C.lookahead);
let att_img = (att_src != null && att_src.data.image[0].length == C.att_R * C.T) ? att_src.data.image[0] : null;
"""

#: Run once when the document is ready: unpack compact images, then draw the state.
ON_READY = r"""
if (occ_store != null) {
  set_image(occ_src, decode(occ_store, 0, C.U, C.T), C.U, C.T);
}
if (att_store != null) {
  const i = mode_select != null ? Math.max(0, C.att_modes.indexOf(mode_select.value)) : C.att_mode_index;
  att_img = decode(att_store, i, C.att_R, C.T);
  set_image(att_src, att_img, C.att_R, C.T);
  att_mapper.high = att_store.scale.data.scale[i];
}
update(cur_u(), cur_eps());
"""

ON_SELECT = r"""
update(cur_u(), cur_eps());
"""

#: Tap on a token in the lanes: forward to the select widget (or update directly).
ON_TAP = r"""
const idx = tok.selected.indices;
if (idx.length != 1) return;
if (select != null) { if (select.value != String(idx[0])) select.value = String(idx[0]); }
else update(idx[0], cur_eps());
"""

ON_ATT_MODE = r"""
const i = C.att_modes.indexOf(mode_select.value);
if (i < 0 || att_store == null) return;
att_img = decode(att_store, i, C.att_R, C.T);
set_image(att_src, att_img, C.att_R, C.T);
att_mapper.high = att_store.scale.data.scale[i];
att_fig.title.text = "decoder cross-attention: " + C.att_mode_labels[i];
update(cur_u(), cur_eps());
"""

ON_SCALE = r"""
const log = scale_toggle.active == 1;
for (const s of post_sources) {
  const d = Object.assign({}, s.data);
  d.y = Array.from(d.p, (v) => (log ? Math.log10(Math.max(v, 1e-4)) : v));
  s.data = d;
}
post_yr.start = log ? -4 : -0.03; post_yr.end = log ? 0.15 : 1.08;
post_axis.ticker = log ? tickers[1] : tickers[0];
post_axis.formatter = log ? formatters[1] : formatters[0];
post_axis.axis_label = log ? "p (log scale)" : "p";
"""
