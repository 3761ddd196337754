//! Double-double numbers (an unevaluated sum `hi + lo` of two f64, about 106 bits): the
//! streaming sums of [`super::cka::CkaSums`] and [`super::cosine::CosineSums`] accumulate in them,
//! so adding the same contributions in another order (shards merged, an image added later)
//! rounds to the same f64 in practice. The error-free transformations are Knuth's TwoSum and
//! the FMA-based TwoProduct (as in Hida, Li and Bailey, "Library for Double-Double and
//! Quad-Double Arithmetic", 2007).

/// `hi + lo`, with `|lo| <= ulp(hi) / 2`.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct Dd {
    pub hi: f64,
    pub lo: f64,
}

fn two_sum(a: f64, b: f64) -> (f64, f64) {
    let s = a + b;
    let bb = s - a;
    (s, (a - (s - bb)) + (b - bb))
}

fn quick_two_sum(a: f64, b: f64) -> (f64, f64) {
    let s = a + b;
    (s, b - (s - a))
}

impl Dd {
    pub fn new(hi: f64, lo: f64) -> Dd {
        let (hi, lo) = quick_two_sum(hi, lo);
        Dd { hi, lo }
    }
    pub fn from_f64(v: f64) -> Dd {
        Dd { hi: v, lo: 0.0 }
    }
    pub fn to_f64(self) -> f64 {
        self.hi + self.lo
    }
    pub fn add(self, o: Dd) -> Dd {
        let (s, e) = two_sum(self.hi, o.hi);
        let (t, f) = two_sum(self.lo, o.lo);
        let (s, e) = quick_two_sum(s, e + t);
        let (hi, lo) = quick_two_sum(s, e + f);
        Dd { hi, lo }
    }
    pub fn add_f64(self, v: f64) -> Dd {
        self.add(Dd::from_f64(v))
    }
    pub fn neg(self) -> Dd {
        Dd {
            hi: -self.hi,
            lo: -self.lo,
        }
    }
    pub fn mul(self, o: Dd) -> Dd {
        let p = self.hi * o.hi;
        let e = self.hi.mul_add(o.hi, -p);
        let e = e + (self.hi * o.lo + self.lo * o.hi);
        let (hi, lo) = quick_two_sum(p, e);
        Dd { hi, lo }
    }
    pub fn div_f64(self, d: f64) -> Dd {
        let q1 = self.hi / d;
        // r = self - q1 * d, exactly enough for the second quotient digit.
        let p = q1 * d;
        let pe = q1.mul_add(d, -p);
        let (s, e) = two_sum(self.hi, -p);
        let r = s + (e - pe + self.lo);
        let q2 = r / d;
        let (hi, lo) = quick_two_sum(q1, q2);
        Dd { hi, lo }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sums_keep_what_f64_loses() {
        // 1 + 1e-20 - 1 is 0 in f64 but 1e-20 in double-double.
        let x = Dd::from_f64(1.0).add_f64(1e-20).add_f64(-1.0);
        assert_eq!(x.to_f64(), 1e-20);
        // Order does not matter for these sums.
        let v = [1e16, 3.0, -1e16, 0.1, 7e-17];
        let fwd = v.iter().fold(Dd::default(), |a, &b| a.add_f64(b));
        let back = v.iter().rev().fold(Dd::default(), |a, &b| a.add_f64(b));
        assert_eq!(fwd.to_f64(), back.to_f64());
        assert_eq!(fwd.to_f64(), 3.1 + 7e-17);
    }

    #[test]
    fn products_and_quotients() {
        let third = Dd::from_f64(1.0).div_f64(3.0);
        let one = third.mul(Dd::from_f64(3.0));
        assert!((one.hi - 1.0).abs() + one.lo.abs() < 1e-30);
        let a = Dd::from_f64(1.0 + f64::EPSILON);
        let sq = a.mul(a); // 1 + 2 eps + eps^2, exactly representable as a double-double
        assert_eq!(sq.hi, 1.0 + 2.0 * f64::EPSILON);
        assert_eq!(sq.lo, f64::EPSILON * f64::EPSILON);
    }
}
