// The report's zoomable map viewer and cut-out gallery (report_viewer.h).
#include "report/report_viewer.h"

#include <algorithm>
#include <cmath>
#include <cstdio>
#include <limits>
#include <sstream>

namespace skerry {
namespace {

using plot::xml_escape;

std::string fmt(const char* f, double v) {
  char b[64];
  std::snprintf(b, sizeof b, f, v);
  return b;
}

/// JSON string literal (the strings here are ASCII text from the catalogue and the page).
std::string jstr(const std::string& s) {
  std::string o = "\"";
  for (char c : s) {
    if (c == '"' || c == '\\') { o += '\\'; o += c; }
    else if (c == '<') o += "\\u003c";  // never "</script>" inside the data block
    else if (static_cast<unsigned char>(c) < 0x20) o += ' ';
    else o += c;
  }
  return o + "\"";
}


}  // namespace

ViewerLayer build_layer(const ImageF& image, const std::string& key, const std::string& title, plot::ColourMap map,
                        const plot::Stretch& stretch, const std::string& unit, double unit_scale,
                        const std::vector<PixBox>& detail, bool allow_detail, const ViewerOptions& opt) {
  ViewerLayer L;
  L.key = key;
  L.title = title;
  L.unit = unit;
  L.colour_bar = plot::colour_bar_svg(stretch, map, unit, unit_scale, 420);
  const long W = image.cols(), H = image.rows();
  if (W <= 0 || H <= 0) return L;
  // Levels: 0 = full resolution, each next one halved, up to the first whose
  // longer side fits the overview size. Complete from the first level at most
  // overview_px on its longer side down to... the coarse ones; finer levels sparse.
  int n = 1;
  while ((std::max(W, H) >> (n - 1)) > opt.tile_px && n < 16) ++n;
  int cf = 0;
  while ((std::max(W, H) + (1L << cf) - 1) / (1L << cf) > opt.overview_px) ++cf;
  cf = std::min(cf, n - 1);
  L.n_levels = n;
  L.complete_from = cf;
  // Detail: the level-0 tiles meeting the boxes, in the boxes' order, within the budget.
  // Tiles are counted from the top-left corner of the picture (FITS row 0 is at the bottom).
  const long T = opt.tile_px;
  const long ntx0 = (W + T - 1) / T, nty0 = (H + T - 1) / T;
  std::vector<char> want0(static_cast<std::size_t>(ntx0 * nty0), 0);
  if (allow_detail && cf > 0) {
    long used = 0;
    for (const PixBox& b : detail) {
      if (used >= opt.detail_budget_px) break;
      const long ya = std::max(0L, (H - b.y1) / T), yb = std::min(nty0 - 1, (H - 1 - b.y0) / T);
      for (long ty = ya; ty <= yb; ++ty)
        for (long tx = std::max(0L, b.x0 / T); tx <= std::min(ntx0 - 1, (b.x1 - 1) / T); ++tx) {
          char& w = want0[static_cast<std::size_t>(ty * ntx0 + tx)];
          if (w || used >= opt.detail_budget_px) continue;
          w = 1;
          used += T * T;
        }
    }
  }
  // Walk the levels, each made once from the one below.
  ImageF half;
  const ImageF* cur = &image;
  for (int l = 0; l < n; ++l) {
    if (l > 0) {
      half = plot::halve(*cur);
      cur = &half;
    }
    const long w = cur->cols(), h = cur->rows();
    const long ntx = (w + T - 1) / T, nty = (h + T - 1) / T;
    for (long ty = 0; ty < nty; ++ty)
      for (long tx = 0; tx < ntx; ++tx) {
        if (l > 0 && l < L.complete_from) continue;  // between full resolution and the overview: nothing (the viewer draws level 0 there)
        if (l < L.complete_from) {
          // Sparse level: kept when it covers a wanted level-0 tile. Picture extent of the
          // tile: x [tx T f, (tx+1) T f), y [oy + ty T f, oy + (ty+1) T f), oy = H - h f.
          const long f = 1L << l, oy = H - h * f;
          const long ya = std::max(0L, (oy + ty * T * f) / T), yb = std::min(nty0 - 1, (oy + (ty + 1) * T * f - 1) / T);
          const long xa = tx * f, xb = std::min(ntx0 - 1, ((tx + 1) * T * f - 1) / T);
          bool any = false;
          for (long y0 = ya; y0 <= yb && !any; ++y0)
            for (long x0 = xa; x0 <= xb && !any; ++x0) any = want0[static_cast<std::size_t>(y0 * ntx0 + x0)] != 0;
          if (!any) continue;
        }
        // Tile rows are counted from the top of the picture: FITS row 0 is at the bottom.
        const long tyt = ty;
        const long ybot = h - (tyt + 1) * T;
        const plot::IndexedRaster r = plot::index_block(*cur, tx * T, ybot, T, T, stretch);
        if (r.width == 0) continue;
        ViewerLayer::Tile t{l, static_cast<int>(tx), static_cast<int>(tyt), plot::base64(plot::encode_png_indexed(r, map, opt.zlib_level))};
        L.bytes += t.png_base64.size();
        if (l == 0) L.full_res_pixels += static_cast<std::size_t>(r.width) * static_cast<std::size_t>(r.height);
        L.tiles.push_back(std::move(t));
      }
  }
  return L;
}

ImageF cut(const ImageF& image, const PixBox& b) {
  ImageF o(std::max(0L, b.height()), std::max(0L, b.width()));
  o.setConstant(std::numeric_limits<float>::quiet_NaN());
  for (long y = std::max(0L, b.y0); y < std::min<long>(image.rows(), b.y1); ++y)
    for (long x = std::max(0L, b.x0); x < std::min<long>(image.cols(), b.x1); ++x) o(y - b.y0, x - b.x0) = image(y, x);
  return o;
}

std::string viewer_html(const std::vector<ViewerLayer>& layers, const ViewerCatalogue& cat, long W, long H,
                        double arcsec_per_pix, const std::array<double, 2>& north, const std::array<double, 2>& east,
                        const ViewerOptions& opt) {
  std::ostringstream d;
  d << "{\"W\":" << W << ",\"H\":" << H << ",\"T\":" << opt.tile_px << ",\"as\":" << fmt("%.6g", arcsec_per_pix)
    << ",\"north\":[" << fmt("%.4f", north[0]) << ',' << fmt("%.4f", north[1]) << "],\"east\":[" << fmt("%.4f", east[0])
    << ',' << fmt("%.4f", east[1]) << "],\"layers\":[";
  for (std::size_t k = 0; k < layers.size(); ++k) {
    const ViewerLayer& L = layers[k];
    d << (k ? "," : "") << "{\"key\":" << jstr(L.key) << ",\"title\":" << jstr(L.title) << ",\"n\":" << L.n_levels
      << ",\"cf\":" << L.complete_from << ",\"note\":" << jstr(L.detail_note) << ",\"t\":{";
    for (std::size_t i = 0; i < L.tiles.size(); ++i)
      d << (i ? "," : "") << '"' << L.tiles[i].level << '/' << L.tiles[i].tx << '/' << L.tiles[i].ty << "\":\""
        << L.tiles[i].png_base64 << '"';
    d << "}}";
  }
  // Components: picture coordinates (x right, y down, pixel edges at integers).
  d << "],\"comps\":[";
  for (std::size_t i = 0; i < cat.comps.size(); ++i) {
    const DrawnComponent& c = cat.comps[i];
    d << (i ? "," : "") << '[' << fmt("%.2f", c.x + 0.5) << ',' << fmt("%.2f", static_cast<double>(H) - (c.y + 0.5)) << ','
      << fmt("%.2f", c.a) << ',' << fmt("%.2f", c.b) << ',' << fmt("%.2f", c.angle_deg) << ',' << c.source << ',' << c.row << ']';
  }
  d << "],\"cols\":[";
  for (std::size_t i = 0; i < cat.columns.size(); ++i) d << (i ? "," : "") << jstr(cat.columns[i]);
  d << "],\"rows\":[";
  for (std::size_t i = 0; i < cat.rows.size(); ++i) {
    d << (i ? "," : "") << '[';
    for (std::size_t j = 0; j < cat.rows[i].size(); ++j) d << (j ? "," : "") << jstr(cat.rows[i][j]);
    d << ']';
  }
  // Source outlines: the convex hull of the FWHM ellipses of a source's components
  // (Andrew's monotone chain, 1979), for sources of more than one component.
  d << "],\"srcs\":[";
  bool first = true;
  for (std::size_t s = 0; s < cat.source_members.size(); ++s) {
    const auto& m = cat.source_members[s];
    if (m.size() < 2) continue;
    std::vector<std::pair<double, double>> p;
    for (std::size_t i : m) {
      const DrawnComponent& c = cat.comps[i];
      const double th = c.angle_deg * M_PI / 180.0, X = c.x + 0.5, Y = static_cast<double>(H) - (c.y + 0.5);
      for (int k = 0; k < 24; ++k) {
        const double t = 2 * M_PI * k / 24, u = 0.5 * c.a * std::cos(t), v = 0.5 * c.b * std::sin(t);
        p.emplace_back(X + u * std::cos(th) - v * std::sin(th), Y + u * std::sin(th) + v * std::cos(th));
      }
    }
    std::sort(p.begin(), p.end());
    auto cross = [](const auto& o, const auto& a, const auto& b) {
      return (a.first - o.first) * (b.second - o.second) - (a.second - o.second) * (b.first - o.first);
    };
    std::vector<std::pair<double, double>> h(2 * p.size());
    std::size_t k = 0;
    for (std::size_t i = 0; i < p.size(); ++i) {
      while (k >= 2 && cross(h[k - 2], h[k - 1], p[i]) <= 0) --k;
      h[k++] = p[i];
    }
    for (std::size_t i = p.size() - 1, t = k + 1; i > 0; --i) {
      while (k >= t && cross(h[k - 2], h[k - 1], p[i - 1]) <= 0) --k;
      h[k++] = p[i - 1];
    }
    h.resize(k > 0 ? k - 1 : 0);
    d << (first ? "" : ",") << "{\"s\":" << s << ",\"p\":[";
    first = false;
    for (std::size_t i = 0; i < h.size(); ++i) d << (i ? "," : "") << fmt("%.1f", h[i].first) << ',' << fmt("%.1f", h[i].second);
    d << "]}";
  }
  d << "],\"slab\":[";
  for (std::size_t i = 0; i < cat.source_labels.size(); ++i) d << (i ? "," : "") << jstr(cat.source_labels[i]);
  d << "]}";

  std::ostringstream o;
  o << "<div class=\"viewer\" id=\"viewer\"><div class=\"vw-main\"><div class=\"vw-bar\">";
  for (std::size_t k = 0; k < layers.size(); ++k)
    o << "<button type=\"button\" class=\"vw-layer" << (k == 0 ? " on" : "") << "\" id=\"vw-btn-" << layers[k].key
      << "\" data-k=\"" << k << "\">" << xml_escape(layers[k].title) << "</button>";
  o << "<span class=\"vw-sep\"></span><button type=\"button\" id=\"vw-in\" title=\"zoom in\">+</button>"
       "<button type=\"button\" id=\"vw-out\" title=\"zoom out\">&#8722;</button>"
       "<button type=\"button\" id=\"vw-fit\">whole map</button>"
       "<label><input type=\"checkbox\" id=\"vw-ov\" checked> components and sources</label></div>\n"
    << "<canvas id=\"vw-canvas\" width=\"900\" height=\"640\" tabindex=\"0\"></canvas>\n"
    << "<div class=\"vw-status\" id=\"vw-status\"></div>";
  for (std::size_t k = 0; k < layers.size(); ++k)
    o << "<div class=\"vw-cbar\" id=\"vw-cbar-" << layers[k].key << "\"" << (k ? " hidden" : "") << ">" << layers[k].colour_bar << "</div>";
  o << "</div><aside class=\"vw-side\"><h3>Catalogue row</h3><p class=\"vw-hint\">Scroll to zoom at the cursor, drag to "
       "pan, click a component (orange ellipse: its FWHM) to pin its row; dashed blue: outline of a source of several "
       "components (hull of their ellipses).</p><table class=\"data\" id=\"vw-row\"><tr><td>no component selected</td></tr></table></aside></div>\n";
  o << "<script type=\"application/json\" id=\"vw-data\">" << d.str() << "</script>\n";
  // The viewer script: tiles decoded lazily, the finest embedded level that is not
  // coarser than the screen drawn over the complete coarse level.
  o << R"JS(<script>
(function(){
'use strict';
var D=JSON.parse(document.getElementById('vw-data').textContent);
var cv=document.getElementById('vw-canvas'),cx=cv.getContext('2d'),st=document.getElementById('vw-status');
var V={k:0,x:D.W/2,y:D.H/2,s:1,sel:-1,hov:-1,ov:true},cache={};
function fit(){V.x=D.W/2;V.y=D.H/2;V.s=Math.min(cv.width/D.W,cv.height/D.H);}
function size(){var w=Math.max(320,Math.round(cv.parentNode.clientWidth));if(cv.width!==w){cv.width=w;}}
function SX(X){return (X-V.x)*V.s+cv.width/2;} function SY(Y){return (Y-V.y)*V.s+cv.height/2;}
function IX(x){return (x-cv.width/2)/V.s+V.x;} function IY(y){return (y-cv.height/2)/V.s+V.y;}
function tile(L,key){var b=L.t[key];if(!b)return null;var c=cache[L.key+key];if(!c){c=new Image();c.onload=draw;c.src='data:image/png;base64,'+b;cache[L.key+key]=c;}return c;}
function level(L,l){var f=1<<l,T=D.T,lh=Math.ceil(D.H/f),oy=D.H-lh*f,missing=0,x0=IX(0),x1=IX(cv.width),y0=IY(0),y1=IY(cv.height);
 for(var ty=Math.max(0,Math.floor((y0-oy)/(T*f)));ty<=Math.floor((y1-oy)/(T*f));ty++)for(var tx=Math.max(0,Math.floor(x0/(T*f)));tx<=Math.floor(x1/(T*f));tx++){
  if(tx*T*f>=D.W||oy+ty*T*f>=D.H)continue;var im=tile(L,l+'/'+tx+'/'+ty);
  if(!im){missing++;continue;} if(!im.complete||!im.naturalWidth)continue;
  cx.drawImage(im,SX(tx*T*f),SY(oy+ty*T*f),im.naturalWidth*f*V.s,im.naturalHeight*f*V.s);}
 return missing;}
function draw(){size();var L=D.layers[V.k];cx.fillStyle='#6d6d6d';cx.fillRect(0,0,cv.width,cv.height);cx.imageSmoothingEnabled=V.s<1;
 var want=Math.max(0,Math.min(L.n-1,Math.floor(Math.log2(1/V.s)+1e-9))),shown=L.cf,miss=0;level(L,L.cf);
 for(var l=L.cf-1;l>=want;l--){var m=level(L,l);if(l===want)miss=m;shown=l;}
 if(want>0&&want<L.cf)level(L,0);
 if(V.ov)overlay();compass();
 var px=V.s>=1?V.s.toFixed(1)+' screen px per map pixel':(1/V.s).toFixed(1)+' map pixels per screen px';
 st.textContent=L.title+' \u00b7 '+px+' \u00b7 '+(want<L.cf&&miss>0?L.note:'level '+shown+' ('+(1<<shown)+'\u00d7'+(1<<shown)+' map pixels per tile pixel)');
 cv.setAttribute('data-zoom',V.s.toFixed(4));cv.setAttribute('data-level',String(want));}
function ell(c,w,col){cx.beginPath();cx.ellipse(SX(c[0]),SY(c[1]),Math.max(c[2]*V.s/2,2.5),Math.max(c[3]*V.s/2,2.5),c[4]*Math.PI/180,0,2*Math.PI);cx.strokeStyle=col;cx.lineWidth=w;cx.stroke();}
function overlay(){var x0=IX(0)-50,x1=IX(cv.width)+50,y0=IY(0)-50,y1=IY(cv.height)+50;
 cx.setLineDash([5,4]);cx.strokeStyle='#56B4E9';cx.lineWidth=1.5;
 D.srcs.forEach(function(s){var p=s.p;cx.beginPath();for(var i=0;i<p.length;i+=2){var X=SX(p[i]),Y=SY(p[i+1]);if(i)cx.lineTo(X,Y);else cx.moveTo(X,Y);}cx.closePath();cx.stroke();});
 cx.setLineDash([]);
 D.comps.forEach(function(c,i){if(c[0]<x0||c[0]>x1||c[1]<y0||c[1]>y1)return;ell(c,1.4,'#E69F00');});
 if(V.hov>=0)ell(D.comps[V.hov],2.2,'#F0E442');if(V.sel>=0){ell(D.comps[V.sel],3.2,'#000');ell(D.comps[V.sel],1.8,'#F0E442');}}
function compass(){var as=D.as/V.s,want=cv.width/5*as,bar=1;[0.5,1,2,5,10,15,30,60,120,300,600,900,1800,3600,7200].forEach(function(c){if(c<=want)bar=c;});
 var L=bar/as,y=cv.height-16;cx.fillStyle='rgba(255,255,255,0.85)';cx.fillRect(8,y-22,L+16,30);cx.fillStyle='#000';cx.fillRect(16,y-1,L,3);
 cx.font='12px DejaVu Sans, sans-serif';cx.textAlign='center';cx.fillText(bar>=60?(bar/60)+' arcmin':bar+' arcsec',16+L/2,y-6);
 var ox=cv.width-46,oy=46;cx.fillStyle='rgba(255,255,255,0.85)';cx.beginPath();cx.arc(ox,oy,40,0,2*Math.PI);cx.fill();
 [[D.north,'N'],[D.east,'E']].forEach(function(a){var dx=a[0][0],dy=-a[0][1];cx.strokeStyle='#000';cx.lineWidth=2;cx.beginPath();cx.moveTo(ox,oy);cx.lineTo(ox+24*dx,oy+24*dy);cx.stroke();cx.fillStyle='#000';cx.fillText(a[1],ox+33*dx,oy+33*dy+4);});}
function pick(e){var r=cv.getBoundingClientRect(),X=IX(e.clientX-r.left),Y=IY(e.clientY-r.top),best=-1,bd=1e30;
 D.comps.forEach(function(c,i){var dx=X-c[0],dy=Y-c[1],t=-c[4]*Math.PI/180,u=dx*Math.cos(t)-dy*Math.sin(t),v=dx*Math.sin(t)+dy*Math.cos(t),
  a=Math.max(c[2]/2,3/V.s),b=Math.max(c[3]/2,3/V.s),q=(u*u)/(a*a)+(v*v)/(b*b);if(q<=1&&q<bd){bd=q;best=i;}});return best;}
function show(i){var t=document.getElementById('vw-row');if(i<0){t.innerHTML='<tr><td>no component selected</td></tr>';t.removeAttribute('data-row');return;}
 var c=D.comps[i],row=D.rows[c[6]],h='';D.cols.forEach(function(n,j){h+='<tr><th>'+n+'</th><td>'+row[j]+'</td></tr>';});
 if(c[5]>=0)h+='<tr><th>source</th><td>'+D.slab[c[5]]+'</td></tr>';t.innerHTML=h;t.setAttribute('data-row',String(c[6]));}
var drag=null,moved=false;
cv.addEventListener('mousedown',function(e){drag={x:e.clientX,y:e.clientY,vx:V.x,vy:V.y};moved=false;});
window.addEventListener('mouseup',function(e){if(drag&&!moved){V.sel=pick(e);show(V.sel);draw();}drag=null;});
cv.addEventListener('mousemove',function(e){if(drag){var dx=e.clientX-drag.x,dy=e.clientY-drag.y;if(Math.abs(dx)+Math.abs(dy)>3)moved=true;V.x=drag.vx-dx/V.s;V.y=drag.vy-dy/V.s;draw();return;}
 var h=pick(e);if(h!==V.hov){V.hov=h;if(V.sel<0)show(h);draw();}});
function zoom(f,px,py){var X=IX(px),Y=IY(py);V.s=Math.max(Math.min(cv.width/D.W,cv.height/D.H)/2,Math.min(32,V.s*f));V.x=X-(px-cv.width/2)/V.s;V.y=Y-(py-cv.height/2)/V.s;draw();}
cv.addEventListener('wheel',function(e){e.preventDefault();var r=cv.getBoundingClientRect();zoom(e.deltaY<0?1.25:0.8,e.clientX-r.left,e.clientY-r.top);},{passive:false});
document.getElementById('vw-in').onclick=function(){zoom(2,cv.width/2,cv.height/2);};
document.getElementById('vw-out').onclick=function(){zoom(0.5,cv.width/2,cv.height/2);};
document.getElementById('vw-fit').onclick=function(){fit();draw();};
document.getElementById('vw-ov').onchange=function(e){V.ov=e.target.checked;draw();};
Array.prototype.forEach.call(document.querySelectorAll('.vw-layer'),function(b){b.onclick=function(){V.k=+b.getAttribute('data-k');
 Array.prototype.forEach.call(document.querySelectorAll('.vw-layer'),function(o){o.classList.toggle('on',o===b);});
 D.layers.forEach(function(L,k){document.getElementById('vw-cbar-'+L.key).hidden=(k!==V.k);});draw();};});
document.addEventListener('click',function(e){var b=e.target.closest?e.target.closest('[data-goto]'):null;if(!b)return;var p=b.getAttribute('data-goto').split(',');
 V.x=+p[0];V.y=+p[1];V.s=+p[2];V.sel=+p[3];show(V.sel);draw();document.getElementById('viewer').scrollIntoView();});
window.addEventListener('resize',draw);
window.skerryViewer={state:function(){return {layer:D.layers[V.k].key,x:V.x,y:V.y,zoom:V.s,selected:V.sel};},
 view:function(x,y,s){V.x=x;V.y=y;V.s=s;draw();},toScreen:function(X,Y){return [SX(X),SY(Y)];},comps:D.comps};
size();fit();draw();
})();
</script>
)JS";
  return o.str();
}

std::string gallery_html(const std::vector<Cutout>& cuts, const ViewerCatalogue& cat, double unit_scale,
                         const std::string& unit, long H) {
  std::ostringstream o;
  std::string last;
  const int P = 168;  // panel side on the page [CSS px]
  for (std::size_t n = 0; n < cuts.size(); ++n) {
    const Cutout& c = cuts[n];
    if (c.category != last) {
      if (!last.empty()) o << "</div>\n";
      o << "<h3>" << xml_escape(c.category) << "</h3><div class=\"gallery\">\n";
      last = c.category;
    }
    // One linear grey scale for image and model, -3 sigma .. the image's peak; the
    // residual on +-5 sigma of the local rms (diverging), so that a good fit leaves pale noise.
    double peak = 0;
    for (Eigen::Index i = 0; i < c.patch[0].size(); ++i)
      if (std::isfinite(c.patch[0].data()[i])) peak = std::max(peak, static_cast<double>(c.patch[0].data()[i]));
    if (!(peak > 0)) for (Eigen::Index i = 0; i < c.patch[1].size(); ++i) if (std::isfinite(c.patch[1].data()[i])) peak = std::max(peak, static_cast<double>(c.patch[1].data()[i]));
    const double rms = c.rms > 0 ? c.rms : std::max(peak, 1e-30) / 100;
    plot::Stretch g;
    g.vmin = -3 * rms;
    g.vmax = std::max(peak, g.vmin + 10 * rms);
    plot::Stretch r;
    r.vmin = -5 * rms;
    r.vmax = 5 * rms;
    const long w = c.box.width(), h = c.box.height();
    const double sc = static_cast<double>(P) / static_cast<double>(std::max(w, h));
    o << "<figure class=\"cutout\" id=\"cut-" << n << "\" data-category=\"" << xml_escape(c.category) << "\"><div class=\"ctitle\">"
      << xml_escape(c.title) << "</div><div class=\"cpanels\">";
    const char* names[3] = {"image", "model", "residual"};
    for (int k = 0; k < 3; ++k) {
      o << "<div class=\"cpanel\"><div class=\"clabel\">" << names[k] << "</div>";
      if (c.patch[k].size() == 0) { o << "<div class=\"missing\" style=\"width:" << P << "px\">no " << names[k] << " map</div></div>"; continue; }
      const plot::IndexedRaster ir = plot::index_block(c.patch[k], 0, 0, w, h, k == 2 ? r : g);
      const auto png = plot::base64(plot::encode_png_indexed(ir, k == 2 ? plot::ColourMap::Diverging : plot::ColourMap::Grey));
      o << "<svg xmlns=\"http://www.w3.org/2000/svg\" width=\"" << fmt("%.0f", w * sc) << "\" height=\"" << fmt("%.0f", h * sc)
        << "\"><image href=\"data:image/png;base64," << png << "\" width=\"" << fmt("%.1f", w * sc) << "\" height=\""
        << fmt("%.1f", h * sc) << "\" style=\"image-rendering:pixelated\"/>";
      for (std::size_t i : c.comps) {
        const DrawnComponent& d = cat.comps[i];
        const double X = (d.x + 0.5 - static_cast<double>(c.box.x0)) * sc, Y = (static_cast<double>(c.box.y1) - (d.y + 0.5)) * sc;
        o << "<ellipse cx=\"" << fmt("%.1f", X) << "\" cy=\"" << fmt("%.1f", Y) << "\" rx=\"" << fmt("%.1f", std::max(0.5 * d.a * sc, 2.0))
          << "\" ry=\"" << fmt("%.1f", std::max(0.5 * d.b * sc, 2.0)) << "\" transform=\"rotate(" << fmt("%.1f", d.angle_deg) << ' '
          << fmt("%.1f", X) << ' ' << fmt("%.1f", Y) << ")\" fill=\"none\" stroke=\"" << (k == 2 ? "#000" : plot::colour::kOrange)
          << "\" stroke-width=\"1.3\"/>";
      }
      o << "</svg></div>";
    }
    const double gx = 0.5 * static_cast<double>(c.box.x0 + c.box.x1), gy = static_cast<double>(H) - 0.5 * static_cast<double>(c.box.y0 + c.box.y1);
    o << "</div><div class=\"cscale\">grey: " << fmt("%.3g", g.vmin * unit_scale) << " … " << fmt("%.3g", g.vmax * unit_scale) << ' '
      << xml_escape(unit) << " (linear); residual: ±" << fmt("%.3g", 5 * rms * unit_scale) << ' ' << xml_escape(unit)
      << " (5σ) · " << w << "×" << h << " px</div><table class=\"data cnum\">" << c.numbers_html << "</table>"
      << "<button type=\"button\" class=\"goto\" data-goto=\"" << fmt("%.1f", gx) << ',' << fmt("%.1f", gy) << ',' << fmt("%.3g", std::clamp(600.0 / std::max(w, h), 1.0, 24.0)) << ','
      << (c.comps.empty() ? -1 : static_cast<long>(c.comps.front())) << "\">show in the viewer</button></figure>\n";
  }
  if (!last.empty()) o << "</div>\n";
  return o.str();
}

}  // namespace skerry
