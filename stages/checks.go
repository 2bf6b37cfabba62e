package stages

import (
	"crypto/sha256"
	"encoding/hex"

	"hindcast/schemas"
)

// toFrame fills f from an accepted candidate, rounding vectors to the
// output type.
func toFrame(f *schemas.Frame, c *checkCtx, src string) {
	l := c.cand
	f.Reset()
	f.Unit, f.Embodiment, f.T, f.Src, f.Line = l.Unit, l.Embodiment, l.T, src, l.Line
	f.Obs = appendRounded(f.Obs, l.Obs, c.f32)
	f.HasAct = l.HasAct
	if l.HasAct {
		f.Act = appendRounded(f.Act, l.Act, c.f32)
	}
	switch l.Ev {
	case "start":
		f.Ev = schemas.EvStart
	case "end":
		f.Ev = schemas.EvEnd
	}
	f.Task, f.HasTask = l.Task, l.HasTask
	f.Success, f.HasSuccess = l.Success, l.HasSuccess
	for i, cam := range c.emb.Cameras {
		var ref string
		if l.HasImages {
			ref = recordedImageRef(c.imgs[i])
		} else {
			ref, _ = cameraRef(l, cam)
		}
		f.ImgRef = append(f.ImgRef, ref)
		f.Img = append(f.Img, c.imgs[i])
	}
}

// recordedImageRef stands for a recording's camera bytes where a JSON Lines
// frame has its reference as written, so that §3.2's comparison (by
// reference) finds two recording frames equal exactly when their bytes are
// (SPEC §7.4). It starts with a byte that is never valid UTF-8, so it can
// never equal a reference a JSON Lines line wrote (such a line is
// malformed).
func recordedImageRef(b []byte) string {
	h := sha256.Sum256(b)
	return "\xffsha256:" + hex.EncodeToString(h[:])
}

func appendRounded(dst, src []float64, f32 bool) []float64 {
	if !f32 {
		return append(dst, src...)
	}
	for _, v := range src {
		dst = append(dst, float64(float32(v)))
	}
	return dst
}
